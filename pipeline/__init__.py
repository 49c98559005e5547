"""twinring: matched-circle searches of HEALPix CMB maps.

The source lives in the repository's ``pipeline/`` folder and installs as the package
``twinring``.
"""
from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("twinring")
except PackageNotFoundError:  # pragma: no cover - running from an uninstalled tree
    __version__ = "0+unknown"

# the public API (twinring.api), loaded on first use so that `import twinring` stays light
_API = ("read_map", "prepare_map", "sample_rings", "pair_s", "search_map", "predict_circles", "make_sky",
        "read_run", "candidate_profiles")


def __getattr__(name):
    if name in _API:
        from . import api

        return getattr(api, name)
    raise AttributeError(f"module 'twinring' has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + list(_API))
