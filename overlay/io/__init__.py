"""Reading what a run is given: scan bundles, the site file, TOML with file/field errors."""
