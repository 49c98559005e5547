"""Work units, backends, shards, merge and resume (issue 5).

The reference is a serial, unsplit run of a general-family search on a torus
sky made here (tests/conftest.py's periodic field, side 1.2 on a unit sphere,
so matched circles at cos(alpha) = L sqrt(2)/2 and L/2: Cornish, Spergel &
Starkman 1998, CQG 15, 2657).  Every other way of running the same search
(shards merged, a Dask local cluster, a joblib pool killed with SIGKILL and
resumed) must write the same tables to the last digit.

The search chunks are made small (``TARGET_PAIRS_PER_CHUNK``) so that every
radius has several blocks of centres and the runs have some 30 chunks.
"""
from __future__ import annotations

import os
import random
import shutil
import signal
import subprocess
import sys
import time
import types
from pathlib import Path

import healpy as hp
import numpy as np
import pytest
import yaml
from astropy.table import Table

from conftest import periodic_field_on_sphere
from twinring import execute, merge, search, store
from twinring.cli import main
from twinring.config import InputError

SMALL_CHUNK = 100_000
SETUP = ("import sys, twinring.search as s; s.TARGET_PAIRS_PER_CHUNK = %d; from twinring.cli import main; "
         "sys.exit(main(sys.argv[1:]))" % SMALL_CHUNK)


@pytest.fixture(scope="module", autouse=True)
def small_chunks():
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(search, "TARGET_PAIRS_PER_CHUNK", SMALL_CHUNK)
        yield


@pytest.fixture(scope="module")
def env(tmp_path_factory):
    d = tmp_path_factory.mktemp("execute")
    m = periodic_field_on_sphere((1.2, 1.2, 1.2), 32, kmax=60, seed=23)
    hp.write_map(str(d / "torus.fits"), m, column_units="uK", dtype=np.float64)
    base = {
        "map": {"path": str(d / "torus.fits")},
        "prepare": {"nside": 32, "lmax": 64, "fwhm_deg": 5.0},
        "search": {"family": "general", "nside_centers": 8, "radius_deg": [25.0, 75.0, 5.0], "top": 4},
        "compute": {"progress": False},
    }
    ns = types.SimpleNamespace(dir=d, base=base)
    ns.cfg = write_cfg(d / "plain.yaml", base)
    ns.ref = d / "ref"
    assert main(["search", str(ns.cfg), "--out", str(ns.ref)]) == 0
    return ns


def write_cfg(path, base, **changes):
    raw = {k: dict(v) for k, v in base.items()}
    for sec, upd in changes.items():
        raw.setdefault(sec, {}).update(upd)
    Path(path).write_text(yaml.safe_dump(raw))
    return Path(path)


def data_lines(path):
    return [line for line in Path(path).read_text().splitlines() if not line.startswith("#")]


def assert_same_tables(a, b):
    for name in ("candidates.ecsv", "peaks.ecsv"):
        la, lb = data_lines(Path(a) / name), data_lines(Path(b) / name)
        assert la == lb, f"{name} differs between {a} and {b}"
        ta, tb = Table.read(Path(a) / name), Table.read(Path(b) / name)
        assert ta.colnames == tb.colnames
        for c in ta.colnames:
            x, y = np.asarray(ta[c]), np.asarray(tb[c])
            assert np.array_equal(x, y, equal_nan=x.dtype.kind == "f"), (name, c)


def chunk_files(d):
    return sorted(p.name for p in (Path(d) / "chunks").glob("u*.npz"))


def test_reference_run_is_a_real_search(env):
    t = Table.read(env.ref / "candidates.ecsv")
    assert len(t) >= 1
    # the first pair (grid S order): an edge circle of the torus, cos(alpha) = L sqrt(2) / 2 (Cornish et al.
    # 1998), within one radius step (5 deg) of the prediction
    assert t["s"][0] > 0.9
    assert abs(t["radius_deg"][0] - np.degrees(np.arccos(1.2 * np.sqrt(2) / 2))) < 5.0
    man = merge.read_manifest(env.ref)
    assert man["shard"] == (0, 1) and man["complete"]
    # several blocks per radius, every chunk stored
    n_radii = 11
    assert man["units_total"] > 2 * n_radii
    assert len(chunk_files(env.ref)) == man["units_total"]


def test_shards_merged_equal_plain_run(env, capsys):
    d = env.dir
    for k in (1, 0):
        assert main(["search", str(env.cfg), "--shard", f"{k}/2", "--out", str(d / f"shard{k}")]) == 0
    m0, m1 = merge.read_manifest(d / "shard0"), merge.read_manifest(d / "shard1")
    assert m0["complete"] and m1["complete"] and m0["work_key"] == m1["work_key"]
    # no finalize in a shard; the two shards split the chunks exactly
    assert not (d / "shard0" / "candidates.ecsv").exists()
    assert set(m0["units"]).isdisjoint(m1["units"])
    assert len(m0["units"]) + len(m1["units"]) == m0["units_total"]
    assert main(["merge", str(d / "shard1"), str(d / "shard0"), "--out", str(d / "merged")]) == 0
    assert_same_tables(env.ref, d / "merged")
    # the merged dir is a complete run: a rerun there resumes every chunk and writes the same tables
    assert main(["search", str(d / "merged" / "config.yaml"), "--out", str(d / "merged")]) == 0
    assert "(0 computed" in (d / "merged" / "twinring.log").read_text()
    assert_same_tables(env.ref, d / "merged")
    capsys.readouterr()


def _err(capsys, argv):
    code = main(argv)
    err = capsys.readouterr().err.strip()
    return code, err


def test_merge_refuses_bad_shard_sets(env, capsys):
    d = env.dir
    for k in (0, 1, 2):
        assert main(["search", str(env.cfg), "--shard", f"{k}/3", "--out", str(d / f"t{k}")]) == 0
    other = write_cfg(d / "other.yaml", env.base, search={"radius_deg": [25.0, 75.0, 10.0]})
    assert main(["search", str(other), "--shard", "1/3", "--out", str(d / "o1")]) == 0
    capsys.readouterr()
    out = str(d / "bad-merge")
    cases = [
        ([d / "t0", d / "o1", d / "t2"], "shard of another search"),
        ([d / "t0", d / "t2"], "shard(s) 1/3 missing"),
        ([d / "t0", d / "t1", d / "t1", d / "t2"], "duplicate shard 1/3"),
        ([d / "t0", d / "t1", d / "ref"], "split"),
        ([d / "t0", d / "t1", d / "nowhere"], "shard directory not found"),
    ]
    for dirs, words in cases:
        code, err = _err(capsys, ["merge", *map(str, dirs), "--out", out])
        assert code == 2, (dirs, err)
        assert words in err and len(err.splitlines()) == 1 and "Traceback" not in err
    # an unfinished shard (its manifest says so) and a shard with a lost chunk file
    man = (d / "t1" / "shard.json").read_text()
    (d / "t1" / "shard.json").write_text(man.replace('"complete": true', '"complete": false'))
    code, err = _err(capsys, ["merge", str(d / "t0"), str(d / "t1"), str(d / "t2"), "--out", out])
    assert code == 2 and "unfinished" in err and "--shard 1/3" in err
    (d / "t1" / "shard.json").write_text(man)
    lost = sorted((d / "t2" / "chunks").glob("u*.npz"))[0]
    lost.unlink()
    code, err = _err(capsys, ["merge", str(d / "t0"), str(d / "t1"), str(d / "t2"), "--out", out])
    assert code == 2 and "missing" in err and lost.name in err
    assert not (Path(out) / "candidates.ecsv").exists()
    # the damaged shard resumes (recomputes only the lost chunk) and the merge then equals the plain run
    assert main(["search", str(env.cfg), "--shard", "2/3", "--out", str(d / "t2")]) == 0
    assert "(1 computed, " in (d / "t2" / "twinring.log").read_text()
    assert main(["merge", str(d / "t0"), str(d / "t1"), str(d / "t2"), "--out", out]) == 0
    assert_same_tables(env.ref, out)


def test_dask_local_cluster_equals_plain_run(env, capsys):
    cfg = write_cfg(env.dir / "dask.yaml", env.base, compute={"backend": "dask", "workers": 2})
    out = env.dir / "dask"
    assert main(["search", str(cfg), "--out", str(out)]) == 0
    log = (out / "twinring.log").read_text()
    assert "on dask x2" in log and "MB per worker" in log
    assert_same_tables(env.ref, out)
    capsys.readouterr()


def test_processes_run_killed_then_resumed_equals_plain_run(env, capsys):
    cfg = write_cfg(env.dir / "procs.yaml", env.base, compute={"backend": "processes", "workers": 2})
    out = env.dir / "killed"
    total = merge.read_manifest(env.ref)["units_total"]
    proc = subprocess.Popen([sys.executable, "-c", SETUP, "search", str(cfg), "--out", str(out)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    try:
        deadline = time.time() + 120
        while time.time() < deadline and proc.poll() is None:
            if (out / "chunks").is_dir() and len(chunk_files(out)) >= 4:
                break
            time.sleep(0.02)
        assert proc.poll() is None, "the run ended before it could be killed"
        os.killpg(proc.pid, signal.SIGKILL)      # the run and its worker processes, like a lost node
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    done = chunk_files(out)
    assert 4 <= len(done) < total
    assert not (out / "candidates.ecsv").exists()
    # every chunk file under a final name is complete
    for name in done:
        assert store.read_unit(out / "chunks" / name)[2].chunk is not None     # checksum and format verified
    assert main(["search", str(cfg), "--out", str(out)]) == 0
    log = (out / "twinring.log").read_text()
    assert f"{total - len(done)} computed, {len(done)} resumed from store" in log
    assert_same_tables(env.ref, out)
    assert not list((out / "chunks").glob(".*.tmp"))
    capsys.readouterr()


def test_output_dir_of_another_config_refused_unless_force(env, capsys):
    other = write_cfg(env.dir / "other2.yaml", env.base, search={"top": 3})
    out = env.dir / "reuse"
    shutil.copytree(env.ref, out)
    before = (out / "candidates.ecsv").read_text()
    capsys.readouterr()
    code, err = _err(capsys, ["search", str(other), "--out", str(out)])
    assert code == 2 and "another config" in err and "--force" in err and len(err.splitlines()) == 1
    assert (out / "candidates.ecsv").read_text() == before
    assert main(["search", str(other), "--out", str(out), "--force"]) == 0
    assert len(Table.read(out / "candidates.ecsv")) == 3
    # `top` is not part of the chunks' work: all were reused, only the candidates were redone
    assert "(0 computed" in (out / "twinring.log").read_text()
    capsys.readouterr()


def test_bad_shard_argument(env, capsys):
    for bad in ("2/2", "1/0", "x", "-1/3", "1/2/3"):
        code, err = _err(capsys, ["search", str(env.cfg), f"--shard={bad}", "--out", str(env.dir / "never")])
        assert code == 2 and "--shard" in err and "0 <= K < N" in err
    assert not (env.dir / "never").exists()


# --------------------------------------------------------------------------- run_units on its own
def _square(common, u):
    return {"u": u, "v": common["scale"] * (u[0] * 10 + u[1]) ** 2}


def _compute(backend, workers=2, memory_gb=4.0):
    return types.SimpleNamespace(backend=backend, workers=workers, scheduler=None, memory_gb=memory_gb)


def test_run_units_shards_partition_and_order():
    ids = [(i, j) for i in range(5) for j in range(3)]
    random.Random(1).shuffle(ids)
    parts = [execute.shard_units(ids, (k, 4)) for k in range(4)]
    flat = [u for p in parts for u in p]
    assert sorted(flat) == sorted(ids) and len(set(flat)) == len(ids)
    # position in the sorted list modulo N
    assert parts[1] == sorted(ids)[1::4]
    assert execute.parse_shard("3/4") == (3, 4)
    with pytest.raises(InputError):
        execute.parse_shard("4/4")
    with pytest.raises(ValueError):
        execute.shard_units([1, 2, 2])
    names = {execute.unit_filename(u) for u in ids}
    assert len(names) == len(ids)
    assert execute.unit_filename((np.int64(3), 1)) == execute.unit_filename((3, 1)) == "u00003-00001.npz"
    assert execute.unit_filename(7) == "u00000007.npz"
    assert execute.unit_filename("a/b") != execute.unit_filename("a_b")


def test_run_units_resume_key_and_damage(tmp_path):
    ids = [(i, j) for i in range(3) for j in range(2)]
    common = {"scale": 2.0}
    calls = []

    def fn(c, u):
        calls.append(u)
        return _square(c, u)

    first = execute.run_units(fn, common, ids, compute=None, store_dir=tmp_path, tag="t", key="k1")
    assert len(calls) == 6 and first.stats.computed == 6
    again = execute.run_units(fn, common, list(reversed(ids)), compute=None, store_dir=tmp_path, tag="t", key="k1")
    assert len(calls) == 6 and again.stats.loaded == 6 and dict(again) == dict(first)
    assert list(again) == sorted(ids)                 # sorted id order whatever the input order
    # a damaged file and a file of other work are recomputed; a stale temporary is removed
    (tmp_path / "t" / execute.unit_filename((1, 1))).write_bytes(b"\x80garbage")
    (tmp_path / "t" / ".u00000-00000.npz.abc.tmp").write_bytes(b"half")
    execute.store_unit(tmp_path, "t", (2, 0), {"u": (2, 0), "v": -1}, key="k0")
    calls.clear()
    third = execute.run_units(fn, common, ids, compute=None, store_dir=tmp_path, tag="t", key="k1")
    assert sorted(calls) == [(1, 1), (2, 0)] and dict(third) == dict(first)
    assert not list((tmp_path / "t").glob(".*.tmp"))
    # another key: everything recomputed
    calls.clear()
    execute.run_units(fn, common, ids, compute=None, store_dir=tmp_path, tag="t", key="k2")
    assert len(calls) == 6


def test_run_units_backends_agree_and_memory_cap(tmp_path):
    ids = list(range(12))
    common = {"scale": 3.0}
    fn = _int_square
    serial = execute.run_units(fn, common, ids, compute=_compute("serial"))
    lines = []
    procs = execute.run_units(fn, common, ids, compute=_compute("processes", 2, memory_gb=1.0), log=lines.append,
                              unit_gb=0.6, tag="capped")
    assert dict(procs) == dict(serial)
    assert any("allows 1 at a time" in line for line in lines)
    assert procs.stats.peak_main_mb > 10
    shard = execute.run_units(fn, common, ids, compute=_compute("processes", 2), shard=(1, 3), store_dir=tmp_path)
    assert list(shard) == ids[1::3] and all(shard[u] == serial[u] for u in shard)
    assert shard.stats.peak_worker_mb > 10 and len(shard.stats.hosts) >= 1


def _int_square(common, u):
    return common["scale"] * u * u


def _nested(common, u):
    inner = execute.run_units(_int_square, common, [u, u + 100], compute=_compute("processes", 2))
    return inner.stats.backend, inner[u]


def test_nested_run_units_in_a_worker_stays_serial():
    res = execute.run_units(_nested, {"scale": 1.0}, [1, 2, 3], compute=_compute("processes", 2))
    assert {r[0] for r in res.values()} == {"serial"}
    assert [r[1] for r in res.values()] == [1.0, 4.0, 9.0]
    assert res.stats.backend == "processes" and res.stats.peak_worker_mb > 10


def test_combine_does_not_depend_on_chunk_order(env):
    from twinring import prepare

    prepared = prepare.read_prepared(env.ref)
    from twinring.config import load_config

    cfg = load_config(env.ref / "config.yaml")
    plan = search.make_plan(prepared, cfg.search, cfg.compute, key="t")
    key = merge.plan_key(plan)
    res = execute.load_units(env.ref, "chunks", plan.chunk_ids(), key)
    assert len(res) == len(plan.chunk_ids())
    chunks = list(res.values())
    a = search.combine(plan, chunks)
    random.Random(5).shuffle(chunks)
    b = search.combine(plan, chunks)
    for name in ("radius_index", "s", "i", "j", "sense", "k", "peak_s", "peak_idx"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    assert a.pairs_scanned == b.pairs_scanned == sum(r.pairs for r in chunks)


def test_dask_scheduler_address_and_progress(tmp_path):
    """compute.scheduler: connect to a running scheduler (here a local one) instead of starting a cluster."""
    from distributed import LocalCluster

    bars = []

    class Bar:
        def __init__(self, iterable, desc="", unit="", total=None):
            self.desc, self.total, self.n, self.closed = desc, total, 0, False
            bars.append(self)

        def update(self, n):
            self.n += n

        def close(self):
            self.closed = True

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        c = types.SimpleNamespace(backend="dask", workers=2, scheduler=cluster.scheduler_address, memory_gb=4.0)
        res = execute.run_units(_int_square, {"scale": 2.0}, range(10), compute=c, store_dir=tmp_path,
                                tag="remote", progress=Bar)
        assert len(cluster.scheduler.workers) == 2     # the cluster outlives the call
    assert dict(res) == {u: 2.0 * u * u for u in range(10)}
    assert res.stats.backend == "dask" and res.stats.peak_worker_mb > 10
    assert len(bars) == 1 and bars[0].total == 10 and bars[0].n == 10 and bars[0].closed
    assert len(list((tmp_path / "remote").glob("u*.npz"))) == 10
