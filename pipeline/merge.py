"""Search chunks on disk: the chunk store of a run and shard manifests (merging: stages.merge_shards).

A search run keeps every finished chunk in ``<run dir>/chunks/`` (see
:mod:`twinring.execute`) and writes ``shard.json``, the manifest::

    {"work_key": ..., "config_hash": ..., "shard": [K, N], "units_total": ...,
     "units": [[ir, ib], ...], "done": [[ir, ib], ...], "complete": true, ...}

``work_key`` is a hash of everything a chunk's result depends on: the search
plan's arrays (prepared a_lm, mask, centres, blocks, ...) and settings,
including the thread count of ring synthesis (which changes the last bits of
the rings).  It does not depend on the backend, worker count, output dir or
shard split, so shards run on different machines with different compute
settings can be merged.  A plain run is shard 0/1.

:func:`twinring.stages.merge_shards` checks that the given directories are the complete set
of shards of one work key (refusing different configs, missing, duplicate or
unfinished shards), loads the plan's prepared map from the first shard, and
runs the same combine + finalize as a single run, so the merged tables are
identical to those of an unsplit run.  An ``--out`` that is one of the input
shards is refused (it would rewrite that shard's manifest), and so is any
damaged, foreign or tampered chunk file (:mod:`twinring.store`: nothing read
executes code).
"""
from __future__ import annotations

import dataclasses
import hashlib
import json
from pathlib import Path

import numpy as np

from . import execute
from .store import read_shard_json
from .config import InputError
from .filters import run_filter

MANIFEST = "shard.json"
CHUNK_TAG = "chunks"
BASE_MB = 200.0     # interpreter, numpy, healpy, astropy in a worker


# --------------------------------------------------------------------------- identity of the work
def _feed(h, v):
    if isinstance(v, np.ndarray):
        a = np.ascontiguousarray(v)
        h.update(f"nd{a.dtype.str}{a.shape}".encode())
        h.update(a.tobytes())
    elif isinstance(v, (tuple, list)):
        h.update(f"seq{len(v)}(".encode())
        for x in v:
            _feed(h, x)
        h.update(b")")
    elif isinstance(v, dict):
        h.update(b"map(")
        for k in sorted(v, key=str):
            _feed(h, str(k))
            _feed(h, v[k])
        h.update(b")")
    elif v is None or isinstance(v, (bool, int, float, str, np.generic)):
        h.update(repr(v.item() if isinstance(v, np.generic) else v).encode())
    elif dataclasses.is_dataclass(v):
        _feed(h, {f.name: getattr(v, f.name) for f in dataclasses.fields(v)})
    else:
        h.update(repr(v).encode())


def plan_key(plan) -> str:
    """Hash of every field of a search plan except its cache label ``key`` (16 hex digits)."""
    h = hashlib.sha256(b"twinring-search-plan-1")
    for f in dataclasses.fields(plan):
        if f.name == "key":
            continue
        _feed(h, f.name)
        _feed(h, getattr(plan, f.name))
    return h.hexdigest()[:16]


def chunk_memory_gb(plan) -> float:
    """Rough peak memory of one search chunk in a worker (GB).

    Ring synthesis at one radius holds the points, their angles and the values
    (about 7 doubles per sample); the spectra of two radii may coexist; the
    pair kernel holds s, k and pair indices (about 64 bytes per pair).
    """
    from . import search as search_mod

    n = int(plan.centres.shape[0])
    ns = int(max(plan.nsamp)) if plan.nsamp else 16
    masked = plan.mask is not None
    synth = 7 * 8 * n * ns
    spectra = 2 * (4 if masked else 1) * 8 * n * (ns // 2 + 1)
    pairs = min(search_mod.TARGET_PAIRS_PER_CHUNK, max((len(b) for b in plan.blocks), default=0) * n)
    mask_b = 0 if plan.mask is None else plan.mask.nbytes
    total = synth + spectra + 64 * pairs + plan.alm.nbytes + mask_b + BASE_MB * 1e6
    return total / 1e9


# --------------------------------------------------------------------------- manifests
def manifest_path(run_dir) -> Path:
    return Path(run_dir) / MANIFEST


def write_manifest(run_dir, cfg, key, shard, units_all, done):
    from .results import TOOL_VERSION, write_text

    k, n = shard or (0, 1)
    mine = execute.shard_units(units_all, (k, n))
    done = set(execute.sorted_units(done))
    data = {
        "tool_version": TOOL_VERSION,
        "work_key": key,
        "config_hash": cfg.hash(),
        "shard": [k, n],
        "units_total": len(units_all),
        "units": [list(u) if isinstance(u, tuple) else u for u in mine],
        "done": [list(u) if isinstance(u, tuple) else u for u in mine if u in done],
        "complete": all(u in done for u in mine),
    }
    body = ",\n".join(f"  {json.dumps(k)}: {json.dumps(v, separators=(',', ':'))}" for k, v in data.items())
    write_text(manifest_path(run_dir), "{\n" + body + "\n}\n")
    return data


def read_manifest(run_dir) -> dict:
    p = manifest_path(run_dir)
    d = Path(run_dir)
    if not d.is_dir():
        raise InputError(f"{d}: shard directory not found; allowed: output directories of `twinring search --shard`")
    if not p.exists():
        raise InputError(f"{p}: no shard manifest; allowed: output directories of `twinring search --shard K/N`")
    allowed = "the shard.json written by `twinring search`"
    data = read_shard_json(p, "shard manifest", allowed, ("work_key", "shard", "units", "done", "units_total"),
                           ("units", "done"))
    if not isinstance(data["work_key"], str) or not isinstance(data["units_total"], int):
        raise InputError(f"{p}: shard manifest damaged (work_key or units_total of the wrong type); allowed: {allowed}")
    return data


# --------------------------------------------------------------------------- running chunks
def run_chunks(plan, cfg, run, shard=None):
    """Scan the plan's chunks (of ``shard``) through the store of ``run``; return {chunk: ChunkResult}.

    Writes the manifest before (``complete: false``) and after the work.
    """
    from . import search as search_mod

    key = plan_key(plan)
    units = plan.chunk_ids()
    stored = execute.load_units(run.dir, CHUNK_TAG, execute.shard_units(units, shard), key)
    write_manifest(run.dir, cfg, key, shard, units, list(stored))
    res = execute.run_units(search_mod.scan_chunk, plan, units, compute=cfg.compute, store_dir=run.dir,
                            tag=CHUNK_TAG, progress=run.progress, shard=shard, key=key, log=run.log,
                            unit_gb=chunk_memory_gb(plan))
    write_manifest(run.dir, cfg, key, shard, units, list(res))
    return res


def chunk_runner(cfg, run, stats_out=None):
    """A ``runner(plan, chunks)`` for :func:`twinring.search.run_search` that stores and resumes chunks."""

    def runner(plan, chunks):
        res = run_chunks(plan, cfg, run)
        if stats_out is not None:
            stats_out.append(res.stats)
        missing = [c for c in chunks if execute._norm(c) not in res]
        if missing:
            raise RuntimeError(f"chunks {missing[:3]} not scanned")
        return [res[execute._norm(c)] for c in chunks]

    return runner


def search_shard(cfg, run, prepared, shard, table=None):
    """Scan only the chunks of ``shard`` (no combine, no finalize); return (plan, results)."""
    from . import search as search_mod

    plan = search_mod.make_plan(prepared, cfg.search, cfg.compute, table, key=cfg.hash(), ring_filter=run_filter(cfg))
    res = run_chunks(plan, cfg, run, shard)
    return plan, res


# --------------------------------------------------------------------------- merging shards
def check_shards(dirs):
    """Manifests of ``dirs``, checked to be every shard of one work, once, finished. Sorted by K."""
    if not dirs:
        raise InputError("merge: no shard directories given; allowed: one directory per shard")
    mans = [(Path(d), read_manifest(d)) for d in dirs]
    d0, m0 = mans[0]
    for d, m in mans[1:]:
        if m["work_key"] != m0["work_key"]:
            raise InputError(f"{d}: shard of another search (work key {m['work_key']}, config hash "
                             f"{m.get('config_hash')}) than {d0} (work key {m0['work_key']}, config hash "
                             f"{m0.get('config_hash')}); allowed: shards of one config")
        if m["shard"][1] != m0["shard"][1]:
            raise InputError(f"{d}: shard {m['shard'][0]}/{m['shard'][1]} of a split into {m['shard'][1]}, but "
                             f"{d0} is {m0['shard'][0]}/{m0['shard'][1]}; allowed: shards of one split")
    n = m0["shard"][1]
    seen = {}
    for d, m in mans:
        k = m["shard"][0]
        if k in seen:
            raise InputError(f"{d}: duplicate shard {k}/{n} (also in {seen[k]}); allowed: each shard once")
        seen[k] = d
    missing = [k for k in range(n) if k not in seen]
    if missing:
        listed = ", ".join(f"{k}/{n}" for k in missing)
        raise InputError(f"merge: shard(s) {listed} missing (given {len(seen)} of {n}); "
                         f"allowed: one directory for each shard 0/{n} .. {n - 1}/{n}")
    for d, m in mans:
        if not m.get("complete") or len(m["done"]) != len(m["units"]):
            k = m["shard"][0]
            raise InputError(f"{d}: shard {k}/{n} unfinished ({len(m['done'])} of {len(m['units'])} chunks done); "
                             f"allowed: finished shards (rerun `twinring search CONFIG --shard {k}/{n} --out {d}`)")
    allu = [u for _, m in mans for u in m["units"]]
    if len(allu) != m0["units_total"] or len(set(allu)) != len(allu):
        raise InputError(f"merge: the shards list {len(set(allu))} distinct chunks, the search has "
                         f"{m0['units_total']}; allowed: shards of one split")
    return sorted(mans, key=lambda x: x[1]["shard"][0])


def load_prepared_for_merge(cfg, dirs):
    """The prepared map: ``prepared.fits`` of the first shard holding one, else re-prepared from the config."""
    from . import prepare as prep_mod

    for d in dirs:
        if (Path(d) / prep_mod.PREPARED_MAP).exists() and (Path(d) / prep_mod.PREPARED_ALM).exists():
            return prep_mod.read_prepared(Path(d) / prep_mod.PREPARED_MAP), Path(d) / prep_mod.PREPARED_MAP
    return prep_mod.load_and_prepare(cfg), None


