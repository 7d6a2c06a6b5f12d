"""The owner's asset register: its element layer, and findings merged into it (GeoPackage or PostGIS)."""
