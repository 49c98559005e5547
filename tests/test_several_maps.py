"""Several maps in one run (map.paths): each prepared, searched and calibrated alike; consistency.ecsv.

Skies: a cubic 3-torus (Sachs-Wolfe field built in conftest, independently of pipeline/topology) whose
faces show matched circles at cos(alpha) = L/2 (Cornish, Spergel & Starkman 1998, CQG 15, 2657), here
alpha = 40 deg, with two face pairs put on centres of the search grid; an isotropic sky from
healpy.synfast (seeded).  With N = 6 simulations the smallest p is 1/7 (Davison & Hinkley 1997), so the
significance level is 0.15, which N = 6 resolves (N >= 1/a - 1; common practice, no source).
"""
from __future__ import annotations

import math

import healpy as hp
import numpy as np
import pytest
from astropy.table import Table

from conftest import periodic_field_on_sphere
from twinring import cli, rings
from twinring.consistency import map_name, match_tables
from twinring.workflow import run_workflow
from twinring.config import load_config

NSIDE, LMAX, NC = 32, 48, 8
ALPHA = 40.0


def _rotation():
    """Two cube faces on centres of the nside 8 grid (both on the equator, 90 deg apart), the third at the pole."""
    c = rings.center_grid(NC)
    _, lat = rings.vec_to_lonlat(c)
    eq = np.flatnonzero(np.abs(lat) < 1e-6)
    a = c[eq[0]]
    b = c[eq[np.argmin(np.abs(c[eq] @ a))]]
    assert abs(a @ b) < 1e-9
    return np.stack([a, b, np.cross(a, b)])


def _face_centres():
    rot = _rotation()
    return rot[0], rot[1]          # the face pairs centred at +-a and +-b are on the grid


@pytest.fixture(scope="module")
def skies(tmp_path_factory):
    d = tmp_path_factory.mktemp("maps")
    L = 2 * math.cos(math.radians(ALPHA))
    torus = periodic_field_on_sphere((L, L, L), NSIDE, kmax=60, seed=3, rotation=_rotation())
    rng = np.random.default_rng(np.random.SeedSequence(21))
    for i, name in enumerate(("method_a", "method_b")):      # two noise realisations of one torus sky
        hp.write_map(str(d / f"{name}.fits"), torus + rng.normal(0.0, 3.0, torus.size), column_units="uK",
                     coord="G", dtype=np.float64)
    ell = np.arange(3 * NSIDE)
    cl = np.where(ell >= 2, 1.0 / np.maximum(ell * (ell + 1), 1), 0.0)
    np.random.seed(4321)
    iso = hp.synfast(cl, NSIDE, lmax=3 * NSIDE - 1)
    hp.write_map(str(d / "isotropic.fits"), iso / iso.std() * 30.0, column_units="uK", coord="G", dtype=np.float64)
    return d


def _config(d, paths, name, extra=""):
    cfg = d / f"{name}.yaml"
    cfg.write_text(
        f"map: {{paths: {paths}}}\n"
        f"prepare: {{nside: {NSIDE}, lmax: {LMAX}, fwhm_deg: 5.0}}\n"
        f"search: {{nside_centers: {NC}, radius_deg: [30, 50, 10], refine: false, top: 8}}\n"
        "calibrate: {simulations: 6, spectrum: data, false_alarm: [0.15], significance: 0.15}\n"
        "compute: {progress: false}\n"
        f"output: {{dir: {d / ('run_' + name)}}}\n" + extra)
    return cfg


def _face_rows(t, names):
    """Rows of consistency.ecsv whose pair is a face pair on the grid (centres +-a or +-b, radius 40 deg)."""
    out = []
    for face in _face_centres():
        hits = []
        for k, r in enumerate(t):
            c1 = rings.lonlat_to_vec(np.array([r["lon1_deg"]]), np.array([r["lat1_deg"]]))[0]
            c2 = rings.lonlat_to_vec(np.array([r["lon2_deg"]]), np.array([r["lat2_deg"]]))[0]
            if abs(r["radius_deg"] - ALPHA) < 1e-6 and max(abs(c1 @ face), abs(c2 @ face)) > math.cos(math.radians(1)) \
                    and c1 @ c2 < -0.999:
                hits.append(k)
        assert len(hits) == 1, f"face pair at {face} in {len(hits)} rows"
        out.append(t[hits[0]])
    return out


def test_two_noise_realisations_of_one_torus_agree(skies, capsys):
    cfg = _config(skies, "[method_a.fits, method_b.fits]", "ab")
    assert cli.main(["run", str(cfg)]) == 0
    out = skies / "run_ab"
    t = Table.read(out / "consistency.ecsv", format="ascii.ecsv")
    names = ["method_a", "method_b"]
    assert t.meta["maps"] == names
    for n in names:                       # each map ran the whole chain in its own directory
        for f in ("prepared.fits", "candidates.ecsv", "thresholds.ecsv", "summary.md"):
            assert (out / "maps" / n / f).exists(), (n, f)
        assert t.meta[f"sha256_map_{n}"]
        assert t.meta[f"map_{n}_unit"] and t.meta[f"map_{n}_frame"].startswith("G")
        assert t.meta[f"map_{n}_n_sims"] == 6
    for r in _face_rows(t, names):
        assert r["n_maps_found"] == 2
        assert r["n_maps_significant"] == 2            # beyond every isotropic simulation in both maps
        for n in names:
            assert r[f"found_{n}"] and r[f"significant_{n}"]
            assert r[f"p_global_{n}"] == pytest.approx(1 / 7)
            assert r[f"s_grid_{n}"] > 0.5
    md = (out / "summary.md").read_text()
    assert "## Several maps" in md and "method_a: S_grid, p_global" in md
    assert "unit" in md and "frame G" in md
    assert "Matched circles significant in all 2 maps" in md
    # a map's own summary names its input unit, frame and field
    own = (out / "maps" / "method_a" / "summary.md").read_text()
    assert "input map: unit" in own and "frame G" in own
    # a rerun with nothing changed skips every stage (stage keys cover every map's checksum)
    status = run_workflow(load_config(cfg), echo=lambda *a: None)
    assert set(status) == {"prepare", "search", "calibrate", "consistency", "report"}
    assert set(status.values()) == {"skipped"}


def test_torus_and_isotropic_map_disagree(skies):
    cfg = _config(skies, "[method_a.fits, isotropic.fits]", "ai")
    run_workflow(load_config(cfg), echo=lambda *a: None)
    t = Table.read(skies / "run_ai" / "consistency.ecsv", format="ascii.ecsv")
    for r in _face_rows(t, ["method_a", "isotropic"]):
        assert r["found_method_a"] and r["significant_method_a"]
        assert not r["found_isotropic"] and not np.isfinite(r["s_grid_isotropic"])
        assert r["n_maps_found"] == 1 and r["n_maps_significant"] == 1
    # nothing of the isotropic sky is significant: a chance pair reaching 1/7 in it would need S beyond all 6 sims
    assert int(np.sum(t["n_maps_significant"] == 2)) == 0


def test_matching_tolerances_and_either_order():
    """The matching rule on hand-made rows: centres swapped still match; a radius step or sense apart does not."""
    a = Table({"rank": [1], "radius_deg": [40.0], "lon1_deg": [0.0], "lat1_deg": [0.0], "lon2_deg": [180.0],
               "lat2_deg": [0.0], "flip": [False], "s_grid": [0.9]})
    b = Table({"rank": [1, 2, 3], "radius_deg": [40.0, 40.0, 60.0], "lon1_deg": [178.0, 0.0, 0.0],
               "lat1_deg": [1.0, 0.0, 0.0], "lon2_deg": [1.0, 180.0, 180.0], "lat2_deg": [-1.0, 0.0, 0.0],
               "flip": [False, True, False], "s_grid": [0.8, 0.7, 0.6]})
    t = match_tables({"a": a, "b": b}, top=1, centre_tol_deg=3.0, radius_tol_deg=10.0)
    assert t["found_b"][0] and t["rank_b"][0] == 1 and t["n_maps_found"][0] == 2
    t = match_tables({"a": a, "b": b}, top=1, centre_tol_deg=1.0, radius_tol_deg=10.0)   # 2.2 deg off: no match
    row = t[t["ref_map"] == "a"][0]
    assert not row["found_b"] and row["rank_b"] == 0
    assert map_name("/x/COM_CMB_IQU-smica_2048_R3.00_full.fits.gz") == "COM_CMB_IQU_smica_2048_R3_00_full"


@pytest.mark.parametrize("paths, extra, what", [
    ("[method_a.fits]", "", "map.path"),                  # both map.path and map.paths
    ("[]", "", "map.paths"),                              # an empty list
    ("[method_a.fits, no_such_map.fits]", "", "no_such_map.fits"),
    ("[method_a.fits, method_b.fits]", "inject: {sizes: [1.5]}\n", "inject"),
])
def test_bad_inputs_one_line(skies, capsys, paths, extra, what):
    cfg = _config(skies, paths, "bad", extra)
    if what == "map.path":
        cfg.write_text(cfg.read_text().replace("map: {", f"map: {{path: {skies / 'method_a.fits'}, "))
    assert cli.main(["run", str(cfg)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and what in err[0] and "Traceback" not in err[0]
    assert not (skies / "run_bad").exists()


def test_stage_commands_iterate_over_the_maps(skies, capsys):
    """`twinring search`, then `calibrate`, then `report` on a map.paths config: the same tables as `run`."""
    cfg = _config(skies, "[method_a.fits, method_b.fits]", "cmds")
    out = skies / "cmds_out"
    assert cli.main(["search", str(cfg), "--out", str(out)]) == 0
    t = Table.read(out / "consistency.ecsv", format="ascii.ecsv")
    faces = _face_rows(t, ["method_a", "method_b"])
    assert all(r["n_maps_found"] == 2 and not np.isfinite(r["p_global_method_a"]) for r in faces)   # not calibrated
    assert all(r["n_maps_significant"] == 0 for r in faces)
    assert cli.main(["report", str(out)]) == 0
    assert "not calibrated" in capsys.readouterr().out
    assert cli.main(["calibrate", str(cfg), "--out", str(out)]) == 0
    t = Table.read(out / "consistency.ecsv", format="ascii.ecsv")
    assert all(r["n_maps_significant"] == 2 for r in _face_rows(t, ["method_a", "method_b"]))
    assert cli.main(["search", str(cfg), "--out", str(out / "x"), "--shard", "1/2"]) == 2
    capsys.readouterr()
    assert cli.main(["report", str(out)]) == 0
    assert "Matched circles significant in all 2 maps" in capsys.readouterr().out
