"""calcium: from calcium-imaging fluorescence to spikes.

The public API is re-exported here; see the README for a tour.
"""
from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("calcium")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"

__all__ = ["__version__"]
