"""`twinring run`: every stage into one directory, unchanged stages skipped; the stage commands."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
import yaml
from astropy.table import Table

from twinring import calibrate as cal
from twinring import workflow
from twinring.cli import main
from twinring.config import load_config
from twinring.topology import manifolds

L_FACE_40 = 2 * math.cos(math.radians(40.0))      # cubic torus with face circles at 40 deg (CSS 1998)


def write_cfg(path, out, **changes):
    cfg = {
        # the domain turned by 5.625 deg about z puts the x and y faces on centres of the nside_centers 8 grid
        "topology": {"space": "E1", "lengths": [L_FACE_40] * 3, "euler_deg": [5.625, 0.0, 0.0]},
        "sky": {"nside": 32, "lmax": 64, "fwhm_deg": 1.0, "seed": 3, "noise_uk_arcmin": 300.0, "mask": "demo",
                "mask_band_deg": 6.0, "mask_holes": 5},
        "prepare": {"nside": 32, "lmax": 64, "fwhm_deg": 4.0},
        "search": {"nside_centers": 8, "radius_deg": [20, 80, 10], "top": 8},
        "calibrate": {"simulations": 30},
        "inject": {"radii_deg": [40.0, 70.0], "realizations": 2},
        "bound": {},
        "output": {"dir": str(out)},
        "compute": {"progress": False},
    }
    for key, val in changes.items():
        sec, _, name = key.partition("__")
        cfg[sec][name] = val
    path.write_text(yaml.safe_dump(cfg))
    return path


@pytest.fixture(scope="module")
def done_run(tmp_path_factory):
    d = tmp_path_factory.mktemp("wf")
    cfg = write_cfg(d / "run.yaml", d / "out")
    assert main(["run", str(cfg)]) == 0
    return d, cfg


def test_euler_alignment_is_what_the_comment_says():
    Q = manifolds.euler_matrix((5.625, 0.0, 0.0))
    lon = np.degrees(np.arctan2(Q[1, 0], Q[0, 0]))
    assert lon == pytest.approx(5.625) and Q[2, 0] == pytest.approx(0.0)


def test_run_writes_every_stage(done_run):
    d, _ = done_run
    out = d / "out"
    for name in ("sky.fits", "mask.fits", "circles.ecsv", "prepared.fits", "candidates.ecsv", "peaks.ecsv",
                 "thresholds.ecsv", "null_peaks.ecsv", "injections.ecsv", "recovery.ecsv", "bound.ecsv",
                 "summary.md", "summary.json", "stages.json", *[f for f in ("fig_peaks.png", "fig_map.png",
                                                                      "fig_recovery.png", "fig_null.png")]):
        assert (out / name).exists(), name
    man = json.loads((out / "stages.json").read_text())["stages"]
    assert set(man) == set(workflow.ORDER)
    cand = Table.read(out / "candidates.ecsv")
    assert {"p_local", "p_global", "z"} <= set(cand.colnames)
    thr = Table.read(out / "thresholds.ecsv")
    assert {"radius_deg", "flip", "false_alarm", "s_threshold"} <= set(thr.colnames)
    assert thr.meta["n_sims"] == 30
    rec = Table.read(out / "recovery.ecsv")
    assert {"size_chi", "radius_deg", "n", "detected", "fraction", "ci_low", "ci_high"} <= set(rec.colnames)
    assert list(rec["n"]) == [2, 2]
    # the stored config points the stages at the synthetic sky
    stored = load_config(out / "config.yaml")
    assert stored.map.path == str(out / "sky.fits") and stored.map.mask == str(out / "mask.fits")


def test_synthetic_torus_is_found_end_to_end(done_run):
    # CSS 1998: the cubic torus of side 2 cos(40 deg) chi has back-to-back face circles of radius 40 deg with
    # opposite senses; the whole chain (sky, prepare, search, calibrate) calls them significant
    d, _ = done_run
    peaks = Table.read(d / "out" / "peaks.ecsv")
    best = cal.best_global(peaks)
    assert best["radius_deg"] == 40.0 and bool(best["flip"])
    assert best["p_global"] < 0.05
    s = json.loads((d / "out" / "summary.json").read_text())
    assert s["most_significant_peak"]["radius_deg"] == 40.0
    # a significant candidate at 40 deg: the bound stage may not claim radii at or below 40 + tolerance
    b = Table.read(d / "out" / "bound.ecsv")
    assert b["n_significant"][0] >= 1
    assert not (b["alpha_min_deg"][0] <= 42.0)


def test_rerun_skips_unchanged_stages(done_run, tmp_path):
    d, cfg = done_run
    status = workflow.run_workflow(load_config(cfg), echo=lambda *a: None)
    assert set(status.values()) == {"skipped"}
    # a new campaign size: only inject, bound and report run again
    changed = write_cfg(d / "run2.yaml", d / "out", inject__radii_deg=[40.0, 60.0])
    status = workflow.run_workflow(load_config(changed), echo=lambda *a: None)
    assert [k for k, v in status.items() if v == "ran"] == ["inject", "bound", "report"]
    # a change of search.top reruns search and everything after it, but the simulations come from the store
    changed = write_cfg(d / "run3.yaml", d / "out", inject__radii_deg=[40.0, 60.0], search__top=5)
    before = Table.read(d / "out" / "thresholds.ecsv")
    status = workflow.run_workflow(load_config(changed), echo=lambda *a: None)
    assert status["sky"] == status["prepare"] == "skipped" and status["search"] == status["calibrate"] == "ran"
    after = Table.read(d / "out" / "thresholds.ecsv")
    assert np.array_equal(before["s_threshold"], after["s_threshold"], equal_nan=True)
    log = (d / "out" / "twinring.log").read_text()
    assert "sims: 30 units (0 computed, 30 resumed from store)" in log


def test_simulations_do_not_depend_on_the_backend(done_run):
    # one SeedSequence spawned per simulation: joblib processes give the serial results (numpy SeedSequence)
    d, cfg = done_run
    c = load_config(d / "out" / "config.yaml")
    sky, prepared = cal.load_data(c)
    ctx = cal.make_context(c, sky, prepared)
    serial = cal.run_simulations(ctx, 3)
    from twinring.config import ComputeSection

    par = cal.run_simulations(ctx, 3, compute=ComputeSection(backend="processes", workers=2, progress=False))
    assert np.array_equal(serial, par)
    stored = cal.load_null_model(d / "out").peaks[:3]
    assert np.allclose(serial, stored)


def test_stage_commands_and_bad_inputs(tmp_path, capsys):
    cfg = write_cfg(tmp_path / "c.yaml", tmp_path / "o", calibrate__false_alarm=[1.5])
    assert main(["run", str(cfg)]) == 2
    err = capsys.readouterr().err
    assert "calibrate.false_alarm" in err and "Traceback" not in err
    cfg = write_cfg(tmp_path / "c2.yaml", tmp_path / "o2", calibrate__spectrum="file",
                    calibrate__spectrum_file=str(tmp_path / "missing.txt"))
    assert main(["calibrate", str(cfg)]) == 2
    assert "spectrum_file not found" in capsys.readouterr().err
    assert not (tmp_path / "o2" / "thresholds.ecsv").exists()
    # bound before inject: one line naming the missing table
    assert main(["bound", str(write_cfg(tmp_path / "c3.yaml", tmp_path / "o3"))]) == 2
    assert "recovery" in capsys.readouterr().err
    assert main(["report", str(tmp_path / "nowhere")]) == 2


@pytest.mark.slow
def test_acceptance_full_size(tmp_path):
    # the done-when: Nside 64, 3 deg beam, antipodal pairs, nside_centers 32, radii 30-80 deg, 40
    # simulations with spectrum: data.  A cubic torus with face circles at 40 deg (CSS 1998: L = 2 cos 40 deg chi)
    # has p_global = 1/41 (beyond every simulation: the Monte Carlo floor); an isotropic sky (E18, simply connected)
    # has p_global > 0.05; 5 % thresholds (the smallest rate 40 simulations resolve here) are higher below 40 deg
    # than above 60 deg (common practice, no source).  A few minutes per sky on 2 cores.
    common = {"prepare": {"nside": 64, "lmax": 128, "fwhm_deg": 3.0},
              "search": {"family": "antipodal", "nside_centers": 32, "radius_deg": [30, 80, 1]},
              "calibrate": {"simulations": 40, "spectrum": "data"},
              "compute": {"backend": "processes", "workers": 2, "progress": False}}
    skies = {"torus": ({"space": "E1", "lengths": [L_FACE_40] * 3, "euler_deg": [17.0, 33.0, 61.0]}, 101),
             "iso": ({"space": "E18", "lengths": []}, 202)}
    best = {}
    for name, (topo, seed) in skies.items():
        cfg = dict(common, topology=topo, output={"dir": str(tmp_path / name)},
                   sky={"nside": 64, "lmax": 128, "fwhm_deg": 0.0, "seed": seed})
        (tmp_path / f"{name}.yaml").write_text(yaml.safe_dump(cfg))
        assert main(["run", str(tmp_path / f"{name}.yaml")]) == 0
        best[name] = cal.best_global(Table.read(tmp_path / name / "peaks.ecsv"))
        thr = Table.read(tmp_path / name / "thresholds.ecsv")
        for flip in (False, True):
            t = thr[(thr["flip"] == flip) & (thr["false_alarm"] == 0.05)]
            assert np.all(t["usable"])
            assert t["s_threshold"][t["radius_deg"] < 40].min() > t["s_threshold"][t["radius_deg"] > 60].max()
        for f in ("fig_peaks.png", "fig_map.png", "fig_null.png"):
            assert (tmp_path / name / f).exists()
    assert best["torus"]["p_global"] == pytest.approx(1 / 41) and abs(best["torus"]["radius_deg"] - 40.0) <= 1.0
    assert best["iso"]["p_global"] > 0.05
