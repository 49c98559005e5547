"""Running work units: serial, joblib processes or a Dask cluster; shards; resume.

A work unit is ``fn(common, unit_id)``: a pure function of a small shared
context and a stable, sortable unit id (a search chunk ``(radius index, block
index)``, a simulation index, ...).  :func:`run_units` returns ``{unit_id:
result}``; the results never depend on the backend, the worker count or the
order in which units ran.
"""
from __future__ import annotations


def run_units(fn, common, unit_ids, *, compute=None, store_dir=None, tag="units", progress=None, shard=None):
    """Run ``fn(common, u)`` for every unit id; return ``{u: result}`` (serial backend)."""
    ids = list(unit_ids)
    it = ids if progress is None else progress(ids, desc=tag, unit="unit")
    return {u: fn(common, u) for u in it}
