"""The one error type of bad input.

:class:`InputError` lives in this dependency-free module so that every module
(``config``, ``topology.manifolds``, ``store``, ...) can raise it without
importing the config machinery; ``twinring.config`` re-exports it, so
``from twinring.config import InputError`` keeps working.
"""
from __future__ import annotations


class InputError(Exception):
    """Bad input (file or config).  The message is one complete line."""


__all__ = ["InputError"]
