"""sweep: robustness sweeps of feedback loops whose plant parameters carry tolerances."""
from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("sweep")
except PackageNotFoundError:  # running from a source tree without install
    __version__ = "0.0.0"

__all__ = ["__version__"]
