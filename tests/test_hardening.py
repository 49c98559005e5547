"""Hardening (issue 15): nothing executes from shared files; limits, signals and merges made safe.

One test (or one parametrised family) per defect of the issue; each fails on
the code before the issue:

* a pickle payload planted in a shard's unit store ran on ``merge`` and on
  resume (common practice, no source: never unpickle files from elsewhere;
  numpy documents ``allow_pickle=False`` as the safe way to load ``.npy/.npz``);
* a huge ``search.nside_centers`` ended in a MemoryError traceback and a radius
  step of 1e-9 climbed in memory until killed;
* ``merge --out`` naming one of its input shards rewrote that shard's manifest
  (search and calibration merges);
* a corrupt ``calibrate_shard.json`` (or ill-typed ``shard.json``) gave a traceback;
* SIGTERM (what batch schedulers send before killing a job; exit status
  128 + 15 = 143 is the shell convention, common practice) exited -15 with no
  message and left worker processes running;
* ``output.dir: ~/x`` made a folder literally named ``~``;
* a ``--force`` run that failed had already replaced config.yaml.

Duplicate YAML keys and constant maps are in tests/test_bad_inputs.py.
"""
from __future__ import annotations

import json
import os
import resource
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import healpy as hp
import numpy as np
import pytest
import yaml

from conftest import periodic_field_on_sphere
from twinring import execute, merge, store
from twinring.cli import main
from twinring.config import InputError


def data_lines(path):
    return [line for line in Path(path).read_text().splitlines() if not line.startswith("#")]


def same_tables(a, b):
    return all(data_lines(Path(a) / n) == data_lines(Path(b) / n) for n in ("candidates.ecsv", "peaks.ecsv"))


def snapshot(d):
    return {str(p.relative_to(d)): p.read_bytes() for p in sorted(Path(d).rglob("*"))
            if p.is_file() and p.name != "twinring.log"}


def one_error_line(capsys, argv, code=2):
    capsys.readouterr()
    got = main(argv)
    err = capsys.readouterr().err.strip()
    assert got == code, (got, err)
    assert len(err.splitlines()) == 1 and err.startswith("twinring: error: ") and "Traceback" not in err, err
    return err


@pytest.fixture(scope="module")
def env(tmp_path_factory):
    """A small antipodal search: a plain reference run and the same search in two shards."""
    d = tmp_path_factory.mktemp("hardening")
    m = periodic_field_on_sphere((1.5, 1.5, 1.5), 16, kmax=30, seed=3)
    hp.write_map(str(d / "sky.fits"), m, column_units="uK", coord="G", dtype=np.float64)
    base = {"map": {"path": str(d / "sky.fits")},
            "prepare": {"nside": 16, "lmax": 32, "fwhm_deg": 8.0},
            "search": {"family": "antipodal", "nside_centers": 4, "radius_deg": [30.0, 60.0, 15.0], "top": 2,
                       "refine": False},
            "compute": {"progress": False}}
    cfg = d / "c.yaml"
    cfg.write_text(yaml.safe_dump(base))
    assert main(["search", str(cfg), "--out", str(d / "ref")]) == 0
    for k in (0, 1):
        assert main(["search", str(cfg), "--shard", f"{k}/2", "--out", str(d / f"s{k}")]) == 0
    return dict(dir=d, cfg=cfg, base=base, ref=d / "ref", shards=[d / "s0", d / "s1"])


def copy_shards(env, where):
    out = []
    for s in env["shards"]:
        shutil.copytree(s, where / s.name)
        out.append(where / s.name)
    return out


# --------------------------------------------------------------------------- 1. no code runs from a store
class Payload:
    """Unpickling this creates the marker file (what a planted ``__reduce__`` payload would do)."""

    def __init__(self, marker):
        self.marker = str(marker)

    def __reduce__(self):
        return (open, (self.marker, "w"))


def _plant(kind, path, marker):
    good = path.read_bytes() if path.exists() else None
    if kind == "pickle":                       # a pickle under the unit's own file name
        import pickle

        path.write_bytes(pickle.dumps({"format": 1, "result": Payload(marker)}))
    elif kind == "object-array":               # an .npz whose array is a pickled object array
        with open(path, "wb") as fh:
            np.savez(fh, __meta__=np.frombuffer(b"{}", np.uint8), a0=np.array([Payload(marker)], dtype=object))
    elif kind == "object-array-with-meta":     # our metadata, but the array is a pickled object
        with np.load(path, allow_pickle=False) as z:
            meta = z["__meta__"]
            n = len(z.files) - 1
        arrays = {f"a{i}": np.array([Payload(marker)], dtype=object) for i in range(n)}
        with open(path, "wb") as fh:
            np.savez(fh, __meta__=meta, **arrays)
    elif kind == "tampered":                   # one number changed, metadata and checksum left alone
        with np.load(path, allow_pickle=False) as z:
            parts = {k: z[k].copy() for k in z.files}
        assert parts["a0"].dtype == np.float64 and parts["a0"].size
        parts["a0"][0] = np.nextafter(parts["a0"][0], 2.0)       # the last bit of one s value
        with open(path, "wb") as fh:
            np.savez(fh, **parts)
    elif kind == "foreign-class":              # a consistent file naming a class outside the allowed table
        with np.load(path, allow_pickle=False) as z:
            parts = {k: z[k].copy() for k in z.files}
        meta = json.loads(parts["__meta__"].tobytes())
        meta["tree"]["c"] = "os.system"
        meta["sha256"] = store._checksum(meta, [parts[f"a{i}"] for i in range(meta["arrays"])])
        parts["__meta__"] = np.frombuffer(json.dumps(meta).encode(), np.uint8)
        with open(path, "wb") as fh:
            np.savez(fh, **parts)
    return good


@pytest.mark.parametrize("kind", ["pickle", "object-array", "object-array-with-meta", "tampered", "foreign-class"])
def test_planted_payload_runs_nothing_on_merge_or_resume(env, tmp_path, capsys, kind):
    s0, s1 = copy_shards(env, tmp_path)
    marker = tmp_path / "PWNED"
    man = merge.read_manifest(s1)
    unit = man["units"][0]
    path = execute.unit_path(s1, merge.CHUNK_TAG, unit)
    assert path.exists()
    _plant(kind, path, marker)
    # merge: refused with one line naming the file, nothing executed, nothing written
    err = one_error_line(capsys, ["merge", str(s0), str(s1), "--out", str(tmp_path / "m")])
    assert str(path) in err and not marker.exists()
    assert not (tmp_path / "m" / "candidates.ecsv").exists()
    # resume of that shard: the unit is recomputed (the log names the file), nothing executed
    assert main(["search", str(env["cfg"]), "--shard", "1/2", "--out", str(s1)]) == 0
    assert not marker.exists()
    log = (s1 / "twinring.log").read_text()
    assert path.name in log and "(1 computed, " in log
    # then the shards merge to the tables of the plain run, to the last digit
    assert main(["merge", str(s0), str(s1), "--out", str(tmp_path / "m")]) == 0
    assert same_tables(env["ref"], tmp_path / "m")
    capsys.readouterr()


def test_store_round_trip_keeps_types_and_bits(tmp_path):
    # results come back type for type and bit for bit (resume writes byte-identical tables)
    from twinring.search import ChunkResult

    r = ChunkResult((2, 1), np.array([0.9, np.nextafter(0.5, 1)]), np.arange(2), np.arange(2) + 5,
                    np.array([0, 1], np.int8), np.array([3, 4]), np.array([0.9, -np.inf]),
                    np.arange(6).reshape(2, 3), 17)
    other = {"a": np.float32(1.25), "b": [1, 2.5, None, True, "x", (3, 4)], 7: float("nan"), "c": 1 + 2j}
    for u, res in (((2, 1), r), (9, other)):
        execute.store_unit(tmp_path, "t", u, res, key="k")
    back = execute.load_unit(tmp_path, "t", (2, 1), "k")
    assert type(back) is ChunkResult and back.chunk == (2, 1) and type(back.pairs) is int
    for f in ("s", "i", "j", "sense", "k", "peak_s", "peak_idx"):
        a, b = getattr(r, f), getattr(back, f)
        assert a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes(), f
    o = execute.load_unit(tmp_path, "t", 9, "k")
    assert type(o["a"]) is np.float32 and o["a"] == np.float32(1.25)
    assert o["b"] == [1, 2.5, None, True, "x", (3, 4)] and np.isnan(o[7]) and o["c"] == 1 + 2j
    # another key is stale (recomputed on resume), a strict read refuses it naming the file
    with pytest.raises(InputError, match="u00000009.npz: made by other work"):
        execute.load_unit(tmp_path, "t", 9, "k2", strict=True)
    # a truncated file: one line naming it
    p = execute.unit_path(tmp_path, "t", 9)
    p.write_bytes(p.read_bytes()[:100])
    with pytest.raises(InputError) as exc:
        execute.load_unit(tmp_path, "t", 9, "k", strict=True)
    assert str(p) in str(exc.value) and "\n" not in str(exc.value)


# --------------------------------------------------------------------------- 3. size limits before work
def _limited_run(cfg, out, mem_gb=3):
    """``twinring search`` in a subprocess with an address-space limit (a runaway fails, not the machine)."""
    def limit():
        resource.setrlimit(resource.RLIMIT_AS, (int(mem_gb * 2 ** 30), int(mem_gb * 2 ** 30)))

    env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
    return subprocess.run([sys.executable, "-m", "twinring.cli", "search", str(cfg), "--out", str(out)],
                          capture_output=True, text=True, timeout=300, preexec_fn=limit, env=env)


@pytest.mark.parametrize("change,words", [
    ({"nside_centers": 1048576}, ["search.nside_centers", "GB", "compute.memory_gb = 4"]),
    ({"radius_deg": [20.0, 80.0, 1e-9]}, ["search.radius_deg", "6e+10 radii", "at most"]),
    ({"family": "general", "nside_centers": 512}, ["search.nside_centers", "3,145,728 centres", "GB"]),
])
def test_search_larger_than_the_limits_is_refused_before_work(env, tmp_path, change, words):
    raw = json.loads(json.dumps(env["base"]))
    raw["search"].update(change)
    cfg = tmp_path / "big.yaml"
    cfg.write_text(yaml.safe_dump(raw))
    t0 = time.time()
    r = _limited_run(cfg, tmp_path / "out")
    assert r.returncode == 2, r.stderr[-2000:]
    err = r.stderr.strip().splitlines()
    assert len(err) == 1 and err[0].startswith(f"twinring: error: {cfg}: "), err
    for w in words:
        assert w in err[0], (w, err[0])
    assert not (tmp_path / "out").exists() and time.time() - t0 < 60


def test_memory_budget_decides(env):
    # the same search passes with the memory it needs: the limit is the budget, not a fixed size
    from twinring.config import config_from_dict, search_size

    raw = json.loads(json.dumps(env["base"]))
    raw["search"].update(family="general", nside_centers=256)
    with pytest.raises(InputError, match="compute.memory_gb = 4 GB"):
        config_from_dict(raw)
    need = search_size(config_from_dict(dict(raw, compute={"memory_gb": 100000.0})))
    # 12 nside^2 centres (HEALPix, Gorski et al. 2005, ApJ 622, 759) and 56 bytes per ring sample at least
    assert need["centres"] == 12 * 256 ** 2 and need["chunk_bytes"] > 56 * need["centres"] * need["samples"]
    raw["compute"] = {"memory_gb": 1.5 * max(need["chunk_bytes"], need["pool_bytes"]) / 1e9}
    config_from_dict(raw)


# --------------------------------------------------------------------------- 5. merges and manifests
def test_search_merge_into_one_of_its_shards_is_refused(env, tmp_path, capsys):
    s0, s1 = copy_shards(env, tmp_path)
    before = snapshot(s0)
    for out in (s0, Path(str(s0) + "/"), tmp_path / "x" / ".." / s0.name):
        err = one_error_line(capsys, ["merge", str(s0), str(s1), "--out", str(out)])
        assert "--out" in err and str(s0) in err and "allowed" in err
    assert snapshot(s0) == before
    # the shards stay mergeable
    assert main(["merge", str(s0), str(s1), "--out", str(tmp_path / "m")]) == 0
    assert same_tables(env["ref"], tmp_path / "m")
    capsys.readouterr()


@pytest.mark.parametrize("text", ['{"work_key": "k", "shard": [0, 2], "units": [[0, [1]]], "done": [], '
                                  '"units_total": 2, "complete": true}',
                                  '{"work_key": "k", "shard": [3, 2], "units": [], "done": [], "units_total": 2}',
                                  '[1, 2]', '{"work_key": ', ''])
def test_corrupt_shard_manifest_is_one_line(env, tmp_path, capsys, text):
    s0, s1 = copy_shards(env, tmp_path)
    (s1 / "shard.json").write_text(text)
    err = one_error_line(capsys, ["merge", str(s0), str(s1), "--out", str(tmp_path / "m")])
    assert str(s1 / "shard.json") in err


@pytest.fixture(scope="module")
def cal(tmp_path_factory):
    d = tmp_path_factory.mktemp("cal")
    m = periodic_field_on_sphere((1.6, 1.6, 1.6), 16, kmax=40, seed=5)
    hp.write_map(str(d / "sky.fits"), m, column_units="uK", dtype=np.float64)
    raw = {"map": {"path": str(d / "sky.fits")}, "prepare": {"nside": 16, "lmax": 32, "fwhm_deg": 8.0},
           "search": {"family": "antipodal", "nside_centers": 4, "radius_deg": [40, 70, 15], "refine": False},
           "calibrate": {"simulations": 4, "seed": 3}, "compute": {"progress": False}}
    (d / "c.yaml").write_text(yaml.safe_dump(raw))
    for k in (0, 1):
        assert main(["calibrate", str(d / "c.yaml"), "--shard", f"{k}/2", "--out", str(d / f"c{k}")]) == 0
    return d


def test_calibration_merge_into_one_of_its_shards_is_refused(cal, tmp_path, capsys):
    c0, c1 = (shutil.copytree(cal / f"c{k}", tmp_path / f"c{k}") for k in (0, 1))
    before = snapshot(c1)
    err = one_error_line(capsys, ["merge", str(c0), str(c1), "--out", str(c1)])
    assert "--out" in err and str(c1) in err
    assert snapshot(c1) == before
    assert main(["merge", str(c0), str(c1), "--out", str(tmp_path / "m")]) == 0
    assert (tmp_path / "m" / "thresholds.ecsv").exists()
    capsys.readouterr()


@pytest.mark.parametrize("text", ["{not json", "[]", '{"setup": "x"}',
                                  '{"setup": "x", "config_hash": "y", "shard": [0, 2], "units": [[0, {}]]}',
                                  '{"setup": "x", "config_hash": "y", "shard": "0/2", "units": [0]}'])
def test_corrupt_calibration_manifest_is_one_line(cal, tmp_path, capsys, text):
    c0, c1 = (shutil.copytree(cal / f"c{k}", tmp_path / f"c{k}") for k in (0, 1))
    (c1 / "calibrate_shard.json").write_text(text)
    err = one_error_line(capsys, ["merge", str(c0), str(c1), "--out", str(tmp_path / "m")])
    assert str(c1 / "calibrate_shard.json") in err


def test_planted_payload_in_calibration_store_runs_nothing(cal, tmp_path, capsys):
    c0, c1 = (shutil.copytree(cal / f"c{k}", tmp_path / f"c{k}") for k in (0, 1))
    marker = tmp_path / "PWNED"
    unit = json.loads((c1 / "calibrate_shard.json").read_text())["units"][0]
    path = execute.unit_path(c1, "sims", unit)
    _plant("pickle", path, marker)
    err = one_error_line(capsys, ["merge", str(c0), str(c1), "--out", str(tmp_path / "m")])
    assert str(path) in err and not marker.exists()


# --------------------------------------------------------------------------- 4. SIGTERM
def _proc_stats():
    """(pid, fields of /proc/<pid>/stat after the command name) of every live process."""
    for p in Path("/proc").iterdir():
        if p.name.isdigit():
            try:
                yield int(p.name), (p / "stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue


def _children(pid):
    """Pids of the direct children of ``pid`` (from /proc)."""
    return [q for q, fields in _proc_stats() if int(fields[1]) == pid]


def _group(pgid):
    """Live pids of process group ``pgid`` (from /proc)."""
    return [q for q, fields in _proc_stats() if int(fields[2]) == pgid and fields[0] != "Z"]


def _alive(pid):
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


@pytest.mark.parametrize("to", ["main", "group"])
def test_sigterm_stops_workers_keeps_units_and_exits_143(tmp_path, to):
    # "main": the signal reaches the main process only; "group": every process of the job (what batch
    # schedulers such as Slurm do, common practice, no source)
    m = periodic_field_on_sphere((1.2, 1.2, 1.2), 32, kmax=60, seed=23)
    hp.write_map(str(tmp_path / "torus.fits"), m, column_units="uK", dtype=np.float64)
    raw = {"map": {"path": str(tmp_path / "torus.fits")}, "prepare": {"nside": 32, "lmax": 64, "fwhm_deg": 5.0},
           "search": {"family": "general", "nside_centers": 8, "radius_deg": [25.0, 75.0, 5.0], "top": 4},
           "compute": {"progress": False, "backend": "processes", "workers": 2}}
    cfg = tmp_path / "p.yaml"
    cfg.write_text(yaml.safe_dump(raw))
    out = tmp_path / "run"
    setup = ("import sys, twinring.search as s; s.TARGET_PAIRS_PER_CHUNK = 100000; from twinring.cli import main; "
             "sys.exit(main(sys.argv[1:]))")
    proc = subprocess.Popen([sys.executable, "-c", setup, "search", str(cfg), "--out", str(out)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, start_new_session=True)
    workers = set()
    try:
        deadline = time.time() + 180
        while time.time() < deadline and proc.poll() is None:
            workers.update(_children(proc.pid))
            if (out / "chunks").is_dir() and len(list((out / "chunks").glob("u*.npz"))) >= 2:
                break
            time.sleep(0.02)
        assert proc.poll() is None, "the run ended before it could be stopped"
        workers.update(_children(proc.pid))
        assert workers, "no worker processes seen"
        if to == "main":
            os.kill(proc.pid, signal.SIGTERM)
        else:
            os.killpg(proc.pid, signal.SIGTERM)
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    assert proc.returncode == 143, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "terminated" in lines[0] and "Traceback" not in err, err
    kept = list((out / "chunks").glob("u*.npz"))
    assert len(kept) >= 2
    # no process left behind: every worker seen is gone, and so is the whole process group
    deadline = time.time() + 20
    while time.time() < deadline and any(_alive(p) for p in workers):
        time.sleep(0.1)
    assert not [p for p in workers if _alive(p)], "worker processes left running"
    left = []
    while time.time() < deadline + 10:
        left = _group(proc.pid)
        if not left:
            break
        time.sleep(0.1)
    assert not left, [(p, Path(f"/proc/{p}/cmdline").read_bytes()[:200]) for p in left]
    # the kept units are sound and resume (read back without error)
    for p in kept:
        store.read_unit(p)


# --------------------------------------------------------------------------- 8. ~ and --force
def test_tilde_is_the_home_directory_everywhere(env, tmp_path, monkeypatch, capsys):
    home, cwd = tmp_path / "home", tmp_path / "cwd"
    home.mkdir()
    cwd.mkdir()
    monkeypatch.setenv("HOME", str(home))
    monkeypatch.chdir(cwd)
    shutil.copy(env["dir"] / "sky.fits", home / "sky.fits")
    raw = json.loads(json.dumps(env["base"]))
    raw["map"]["path"] = "~/sky.fits"
    raw["output"] = {"dir": "~/runs/a"}
    (home / "c.yaml").write_text(yaml.safe_dump(raw))
    assert main(["prepare", "~/c.yaml"]) == 0                        # config path and output.dir
    assert (home / "runs" / "a" / "prepared.fits").exists()
    assert main(["search", "~/c.yaml", "--shard", "0/2", "--out=~/s0"]) == 0
    assert main(["search", "~/c.yaml", "--shard", "1/2", "--out=~/s1"]) == 0
    assert main(["merge", "~/s0", "~/s1", "--out=~/m"]) == 0         # merge inputs and output
    assert same_tables(env["ref"], home / "m")
    assert not (cwd / "~").exists() and not list(cwd.rglob("*"))
    capsys.readouterr()


def test_failed_force_run_keeps_the_old_config(env, tmp_path, monkeypatch, capsys):
    import twinring.stages as stages

    out = shutil.copytree(env["ref"], tmp_path / "run")
    old = (out / "config.yaml").read_bytes()
    raw = json.loads(json.dumps(env["base"]))
    raw["search"]["top"] = 1
    other = tmp_path / "other.yaml"
    other.write_text(yaml.safe_dump(raw))

    def fail(*a, **k):
        raise InputError("simulated failure inside the stage")

    with monkeypatch.context() as mp:
        mp.setattr(stages, "search_prepared", fail)
        one_error_line(capsys, ["search", str(other), "--out", str(out), "--force"])
        assert (out / "config.yaml").read_bytes() == old

        def crash(*a, **k):
            raise RuntimeError("a bug")

        mp.setattr(stages, "search_prepared", crash)
        with pytest.raises(RuntimeError):
            main(["search", str(other), "--out", str(out), "--force"])
        assert (out / "config.yaml").read_bytes() == old
    # the run that succeeds replaces it
    assert main(["search", str(other), "--out", str(out), "--force"]) == 0
    from twinring.config import load_config

    assert load_config(out / "config.yaml").search.top == 1
    capsys.readouterr()
