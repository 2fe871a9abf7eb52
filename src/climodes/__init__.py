"""climodes: dominant modes of variability (EOFs and PCs) of gridded climate fields."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("climodes")
except PackageNotFoundError:  # running from a source tree that was not installed
    __version__ = "0+unknown"
