"""overlay: screening zones from acoustic laser-vibrometer scans onto drawings, quantities and GIS layers."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("overlay")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+source"

__all__ = ["__version__"]
