"""strayline: live field maps and fault alerts for scanning NV magnetometry."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("strayline")
except PackageNotFoundError:  # running from a source tree that was not installed
    __version__ = "0.0.0+unknown"

__all__ = ["__version__"]
