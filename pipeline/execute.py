"""Running work units: serial, joblib processes or a Dask cluster; shards; resume.

A work unit is ``fn(common, unit_id)``: a pure function of a shared context
(``common``, shipped once to every worker) and a stable, sortable unit id (a
search chunk ``(radius index, block index)``, a simulation index, ...).
:func:`run_units` returns ``{unit_id: result}``; the results never depend on
the backend, the worker count, the shard split or the order in which units ran.

Backends (``compute.backend``)
    ``serial``     in this process, in sorted id order.
    ``processes``  joblib's loky pool of ``compute.workers`` local processes.
    ``dask``       Dask distributed: a ``LocalCluster`` of ``compute.workers``
                   single-threaded worker processes when ``compute.scheduler`` is
                   null, otherwise a ``Client`` of the scheduler at that address
                   (workers started by hand or by dask-jobqueue, see scripts/).

Store and resume
    With ``store_dir``, every finished unit is written to
    ``store_dir/<tag>/<name>.npz`` (name from the unit id, see
    :func:`unit_filename`; format in :mod:`twinring.store`: no pickle, read
    with ``allow_pickle=False``, versioned and checksummed) through
    :func:`twinring.results.atomic_path`: a temporary file renamed into place,
    so a final name never holds a half-written file.  The file records the
    unit id and the ``key`` of the work (e.g. a hash of the search plan); a
    later call with the same key loads finished units instead of recomputing
    them, so a run killed at any moment resumes where it stopped.  On resume a
    file with another key or id, or a damaged, foreign or tampered one, is
    logged (naming the file), recomputed and overwritten; merges
    (``strict=True``) refuse it with a one-line :class:`InputError` instead.
    Results are written by the calling process as they arrive, so remote
    workers need no shared file system.  One store must not be written by two
    runs at once.

Shards
    ``shard=(K, N)``: only the units whose position in the sorted id list is
    ``K`` modulo ``N`` (:func:`shard_units`).

Memory
    ``compute.memory_gb`` is the budget of all units in flight together (on
    every worker).  ``unit_gb`` (an estimate of one unit's peak memory) caps
    the units in flight at ``floor(memory_gb / unit_gb)`` (at least one); a
    ``LocalCluster`` gets ``memory_limit = memory_gb / workers`` per worker.  Every result comes
    back with its worker's peak resident memory, reported in the summary.

Nesting: a ``run_units`` call inside a unit that already runs in a worker
falls back to ``serial`` (no pools inside pools).
"""
from __future__ import annotations

import logging
import math
import os
import pickle
import re
import socket
import tempfile
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path

from . import store as _store
from .errors import InputError

_log = logging.getLogger("twinring.execute")

_IN_WORKER = False          # set in worker processes by _task
_SHARED: dict = {}          # token -> common object, per worker process


# --------------------------------------------------------------------------- ids, names, shards
def _norm(u):
    """Unit id with numpy scalars turned into Python ones (stable pickles, names and comparisons)."""
    if isinstance(u, (list, tuple)):
        return tuple(_norm(x) for x in u)
    if hasattr(u, "item") and not isinstance(u, (str, bytes)):
        try:
            return u.item()
        except (TypeError, ValueError):
            return u
    return u


_SAFE = re.compile(r"^[A-Za-z0-9_.+-]{1,80}$")


def unit_filename(u) -> str:
    """Stable file name of a unit id: ``u00000012.npz``, ``u00003-00001.npz``, ``u-name.npz`` or a hash."""
    import hashlib

    u = _norm(u)
    if isinstance(u, bool):
        pass
    elif isinstance(u, int) and u >= 0:
        return f"u{u:08d}{_store.SUFFIX}"
    elif isinstance(u, tuple) and u and all(isinstance(x, int) and not isinstance(x, bool) and x >= 0 for x in u):
        return "u" + "-".join(f"{x:05d}" for x in u) + _store.SUFFIX
    elif isinstance(u, str) and _SAFE.match(u) and not u.startswith("."):
        return f"u-{u}{_store.SUFFIX}"
    return "u-h" + hashlib.sha256(repr(u).encode()).hexdigest()[:20] + _store.SUFFIX


def parse_shard(text, what="--shard"):
    """``"K/N"`` -> ``(K, N)`` with ``0 <= K < N``; InputError otherwise."""
    if text is None:
        return None
    if isinstance(text, (tuple, list)):
        k, n = text
    else:
        m = re.fullmatch(r"\s*(\d+)\s*/\s*(\d+)\s*", str(text))
        if not m:
            raise InputError(f"{what}: found {str(text)!r}; allowed: K/N with integers 0 <= K < N (e.g. 0/4)")
        k, n = int(m.group(1)), int(m.group(2))
    if not (isinstance(k, int) and isinstance(n, int) and n >= 1 and 0 <= k < n):
        raise InputError(f"{what}: found {k}/{n}; allowed: K/N with integers 0 <= K < N (e.g. 0/4)")
    return (k, n)


def sorted_units(unit_ids):
    ids = [_norm(u) for u in unit_ids]
    try:
        ids = sorted(ids)
    except TypeError:
        raise TypeError("run_units: unit ids must be mutually sortable (ints, strings or tuples of them)")
    for a, b in zip(ids, ids[1:]):
        if a == b:
            raise ValueError(f"run_units: unit id {a!r} given twice")
    return ids


def shard_units(unit_ids, shard=None):
    """The ids of shard ``(K, N)``: positions ``p`` in the sorted id list with ``p % N == K``."""
    ids = sorted_units(unit_ids)
    if shard is None:
        return ids
    k, n = parse_shard(shard, "shard")
    return [u for p, u in enumerate(ids) if p % n == k]


# --------------------------------------------------------------------------- the store
def unit_path(store_dir, tag, u) -> Path:
    return Path(store_dir) / tag / unit_filename(u)


def store_unit(store_dir, tag, u, result, key=None) -> Path:
    """Write one unit's result atomically (:func:`twinring.store.write_unit`, with the unit id and work key)."""
    return _store.write_unit(unit_path(store_dir, tag, u), _norm(u), key, result)


_MISSING = object()     # no default given: raise KeyError
_ABSENT = object()      # returned by load_unit(..., default=_ABSENT)


def load_unit(store_dir, tag, u, key=None, default=_MISSING, strict=False, say=None):
    """A stored result of unit ``u`` made under ``key``.

    Absent: ``default`` (or KeyError).  Stale (other key or unit), damaged,
    foreign or tampered: with ``strict`` a one-line :class:`~twinring.store.StoreError`
    (an InputError naming the file); otherwise ``say(reason)`` and ``default``
    (or KeyError), so that the unit is recomputed.  Nothing read executes code.
    """
    path = unit_path(store_dir, tag, u)
    if not path.exists():
        why = f"{path}: absent"
    else:
        try:
            return _store.read_unit(path, _norm(u), key)[2]
        except _store.StoreError as exc:
            if strict:
                raise
            why = exc.reason
            if say is not None:
                say(f"{tag}: {why}; recomputing it")
    if default is _MISSING:
        raise KeyError(why)
    return default


def load_units(store_dir, tag, unit_ids, key=None, strict=False, say=None):
    """``{u: result}`` of the stored units among ``unit_ids`` made under ``key``.

    Absent units are left out; others that cannot be used are left out too
    (``say`` told why), or with ``strict`` refused with a one-line InputError.
    """
    out = {}
    for u in unit_ids:
        r = load_unit(store_dir, tag, u, key, default=_ABSENT, strict=strict, say=say)
        if r is not _ABSENT:
            out[_norm(u)] = r
    return out


def load_shard_units(d, tag, units, key, shard_label, what):
    """Every stored unit of one shard directory, or a one-line InputError naming the first file missing or bad.

    Used by both merges (search chunks, calibration simulations); nothing read executes code.
    """
    got = load_units(d, tag, units, key, strict=True)
    lost = [u for u in units if _norm(u) not in got]
    if lost:
        raise InputError(f"{unit_path(d, tag, lost[0])}: {len(lost)} {what} file(s) of {shard_label} in {d} "
                         f"missing (this one first); allowed: rerun that shard")
    return got


def _clean_temporaries(d: Path):
    """Remove temporaries left by a killed run (``.<name>.*.tmp``) in one store directory."""
    if not d.is_dir():
        return 0
    n = 0
    for p in d.glob(".*.tmp"):
        try:
            p.unlink()
            n += 1
        except OSError:
            pass
    return n


# --------------------------------------------------------------------------- worker side
def _load_shared(token, path):
    """The shared context in a worker process: unpickled once per worker and run (by token).

    The file is this run's own temporary file (``mkstemp``, mode 0600, written by
    :func:`_processes` a moment before and removed after), never a file from a
    run or shard directory.
    """
    obj = _SHARED.get(token)
    if obj is None:
        _SHARED.clear()
        with open(path, "rb") as fh:
            obj = pickle.load(fh)
        _SHARED[token] = obj
    return obj


def _worker_peak_mb():
    from .rundir import peak_memory_mb

    return peak_memory_mb()


def _task(fn, common, u, shared=None):
    """Run one unit in a worker: returns (u, result, worker peak MB, host:pid)."""
    global _IN_WORKER
    before, _IN_WORKER = _IN_WORKER, True     # nested run_units calls inside fn stay serial
    try:
        if shared is not None:
            common = _load_shared(*shared)
        r = fn(common, u)
    finally:
        _IN_WORKER = before
    return u, r, _worker_peak_mb(), f"{socket.gethostname()}:{os.getpid()}"


# --------------------------------------------------------------------------- summary
@dataclass
class UnitStats:
    tag: str
    backend: str
    workers: int
    total: int = 0               # units of this call (after sharding)
    loaded: int = 0              # taken from the store
    computed: int = 0
    wall_s: float = 0.0
    peak_worker_mb: float = 0.0  # largest peak resident memory reported by a worker
    peak_main_mb: float = 0.0
    hosts: set = field(default_factory=set)

    def line(self) -> str:
        mem = f"peak memory {self.peak_main_mb:.0f} MB here"
        if self.peak_worker_mb:
            mem += f", {self.peak_worker_mb:.0f} MB per worker"
        return (f"{self.tag}: {self.total} units ({self.computed} computed, {self.loaded} resumed from store) "
                f"on {self.backend} x{self.workers} in {self.wall_s:.1f} s; {mem}")


class UnitResults(dict):
    """``{unit_id: result}`` with a ``stats`` attribute (:class:`UnitStats`)."""
    stats: UnitStats


# --------------------------------------------------------------------------- the runner
def _compute_params(compute):
    backend = getattr(compute, "backend", "serial") if compute is not None else "serial"
    workers = int(getattr(compute, "workers", 1) or 1) if compute is not None else 1
    memory_gb = float(getattr(compute, "memory_gb", 4.0) or 4.0) if compute is not None else 4.0
    scheduler = getattr(compute, "scheduler", None) if compute is not None else None
    return backend, workers, memory_gb, scheduler


def _fmt_s(sec):
    if not math.isfinite(sec):
        return "?"
    if sec < 120:
        return f"{sec:.0f} s"
    if sec < 7200:
        return f"{sec / 60:.1f} min"
    return f"{sec / 3600:.1f} h"


def run_units(fn, common, unit_ids, *, compute=None, store_dir=None, tag="units", progress=None, shard=None,
              key=None, log=None, unit_gb=None):
    """Run ``fn(common, u)`` for every unit id (of ``shard``), return :class:`UnitResults` ``{u: result}``.

    ``compute``: the config's compute section (backend, workers, scheduler, memory_gb); ``None`` = serial.
    ``store_dir``: keep each result in ``store_dir/<tag>/`` and reuse stored ones (resume).
    ``progress``: ``progress(iterable, desc=, unit=, total=)`` wrapping an iterator (e.g. ``Run.progress``).
    ``shard``: ``(K, N)`` or ``"K/N"``.  ``key``: identity of the work, checked on stored units.
    ``log``: ``log(message)`` for progress lines (default: the ``twinring.execute`` logger).
    ``unit_gb``: estimated peak memory of one unit, to cap the units in flight by ``compute.memory_gb``.
    Results are keyed by unit id (numpy integers in ids become Python ints).
    """
    from .rundir import peak_memory_mb

    say = log or _log.info
    backend, workers, memory_gb, scheduler = _compute_params(compute)
    if _IN_WORKER:
        backend, workers = "serial", 1
    ids = shard_units(unit_ids, shard)
    stats = UnitStats(tag=tag, backend=backend, workers=workers if backend != "serial" else 1, total=len(ids))
    t0 = time.time()
    out = UnitResults()
    out.stats = stats

    # ---- resume: load what the store already holds
    todo = ids
    if store_dir is not None:
        d = Path(store_dir) / tag
        _clean_temporaries(d)
        todo = []
        for u in ids:
            r = load_unit(store_dir, tag, u, key, default=_ABSENT, say=say)
            if r is _ABSENT:
                todo.append(u)
            else:
                out[u] = r
        stats.loaded = len(out)
    where = "" if shard is None else f" (shard {parse_shard(shard)[0]}/{parse_shard(shard)[1]})"
    parallel = workers
    if unit_gb and unit_gb > 0 and backend != "serial":
        cap = max(1, int(memory_gb // unit_gb))
        if cap < parallel:
            say(f"{tag}: one unit needs about {unit_gb:.2f} GB; compute.memory_gb = {memory_gb:g} allows "
                f"{cap} at a time (of {workers} workers)")
            parallel = cap
    if unit_gb and unit_gb > memory_gb:
        say(f"{tag}: warning: one unit needs about {unit_gb:.2f} GB, more than compute.memory_gb = {memory_gb:g}")
    say(f"{tag}: {len(ids)} units{where}, {stats.loaded} already done, {len(todo)} to run on {backend}"
        + (f" with {parallel} workers" if backend != "serial" else ""))

    if todo:
        stream = _stream(backend, parallel, scheduler, memory_gb, fn, common, todo, workers)
        bar = progress(_Counter(), desc=tag, unit="unit", total=len(todo)) if progress else None
        done = 0
        next_log = time.time() + 30.0
        step = max(1, len(todo) // 10)
        t_run = time.time()
        try:
            for u, r, peak, host in stream:
                u = _norm(u)
                if store_dir is not None:
                    store_unit(store_dir, tag, u, r, key)
                out[u] = r
                done += 1
                stats.computed = done
                if peak:
                    stats.peak_worker_mb = max(stats.peak_worker_mb, peak)
                if host:
                    stats.hosts.add(host)
                if bar is not None and hasattr(bar, "update"):
                    bar.update(1)
                now = time.time()
                if done % step == 0 or now >= next_log or done == len(todo):
                    rate = done / max(now - t_run, 1e-9)
                    eta = (len(todo) - done) / rate if rate > 0 else float("inf")
                    say(f"{tag}: {done}/{len(todo)} run, eta {_fmt_s(eta)}")
                    next_log = now + 30.0
        finally:
            close = getattr(stream, "close", None)
            if close is not None:
                close()
            if bar is not None and hasattr(bar, "close"):
                bar.close()
    stats.wall_s = time.time() - t0
    stats.peak_main_mb = peak_memory_mb()
    say(stats.line())
    # results in sorted id order (dict order), whatever the completion order
    ordered = UnitResults((u, out[u]) for u in ids)
    ordered.stats = stats
    return ordered



class _Counter:
    """A stand-in iterable for progress bars that are advanced by hand (``update``)."""

    def __iter__(self):
        return iter(())


def _stream(backend, parallel, scheduler, memory_gb, fn, common, todo, workers):
    if backend == "serial" or (backend == "processes" and parallel <= 1 and workers <= 1):
        return _serial(fn, common, todo)
    if backend == "processes":
        return _processes(fn, common, todo, parallel)
    if backend == "dask":
        return _dask(fn, common, todo, workers, parallel, scheduler, memory_gb)
    raise InputError(f"compute.backend: found {backend!r}; allowed: serial | processes | dask")


def _serial(fn, common, todo):
    for u in todo:
        yield u, fn(common, u), 0.0, ""


def _processes(fn, common, todo, parallel):
    """joblib (loky) pool; ``common`` is pickled once to a temporary file and loaded once per worker."""
    from joblib import Parallel, delayed
    import cloudpickle   # a dependency of joblib (loky) and dask

    fd, path = tempfile.mkstemp(prefix="twinring-common-", suffix=".pkl")
    try:
        with os.fdopen(fd, "wb") as fh:
            cloudpickle.dump(common, fh, protocol=pickle.HIGHEST_PROTOCOL)
        shared = (uuid.uuid4().hex, path)
        par = Parallel(n_jobs=parallel, backend="loky", return_as="generator_unordered", batch_size=1,
                       pre_dispatch="2*n_jobs")
        gen = par(delayed(_task)(fn, None, u, shared) for u in todo)
        try:
            yield from gen
        finally:
            close = getattr(gen, "close", None)
            if close is not None:
                close()
    finally:
        try:
            os.unlink(path)
        except OSError:
            pass


def _dask(fn, common, todo, workers, parallel, scheduler, memory_gb):
    """Dask distributed: ``common`` is scattered once to every worker; results stream back as they finish."""
    from distributed import Client, LocalCluster, as_completed

    cluster = None
    if scheduler:
        try:
            client = Client(scheduler, timeout="30s")
        except (OSError, TimeoutError) as exc:
            raise InputError(f"compute.scheduler: cannot reach {scheduler!r} ({exc.__class__.__name__}); "
                             "allowed: the address of a running Dask scheduler, or null for a local cluster")
    else:
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None,
                               memory_limit=f"{max(memory_gb / workers, 0.25):.3f}GB", silence_logs=logging.ERROR)
        client = Client(cluster)
    try:
        shared = client.scatter(common, broadcast=True, hash=False)
        token = uuid.uuid4().hex[:8]
        queue = list(todo)
        # all units at once, unless the memory budget caps the units in flight
        limit = parallel if parallel < workers else len(queue)
        pending = as_completed()
        in_flight = 0

        def submit(u):
            return client.submit(_task, fn, shared, u, key=f"unit-{token}-{unit_filename(u)[:-4]}", pure=False)

        while queue and in_flight < limit:
            pending.add(submit(queue.pop(0)))
            in_flight += 1
        for fut in pending:
            res = fut.result()
            fut.release()
            in_flight -= 1
            if queue:
                pending.add(submit(queue.pop(0)))
                in_flight += 1
            yield res
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
