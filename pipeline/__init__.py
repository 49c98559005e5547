"""twinring: matched-circle searches of HEALPix CMB maps.

The source lives in the repository's ``pipeline/`` folder and installs as the package
``twinring``.
"""
from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("twinring")
except PackageNotFoundError:  # pragma: no cover - running from an uninstalled tree
    __version__ = "0+unknown"
