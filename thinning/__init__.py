"""thinning: capillary-thinning extensional rheometry from high-speed recordings."""

from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("thinning")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"
