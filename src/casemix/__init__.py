"""casemix: risk-adjusted observed-versus-expected evaluation of clinical programs."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("casemix")
except PackageNotFoundError:  # running from a source tree that was not installed
    __version__ = "0.0.0+unknown"

__all__ = ["__version__"]
