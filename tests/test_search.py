"""The search finds the circles that geometry predicts, and only those.

Where circles lie: Cornish, Spergel & Starkman 1998 (CQG 15, 2657): an image of the observer at
distance d gives a circle pair of radius alpha with cos(alpha) = d / (2 chi), centres along the
image directions; a cubic torus of side L has three face pairs (d = L) and six edge pairs
(d = L sqrt 2).  Translations traverse the two circles in opposite senses (Weeks, The Shape of
Space), flip = True in our convention.
"""
import math

import numpy as np
import healpy as hp
import pytest
import yaml
from astropy.table import Table

from twinring import cli, rings, search
from twinring.config import SearchSection
from conftest import periodic_field_on_sphere, prepared_from_map

L_TORUS = 1.2
FACE_DEG = math.degrees(math.acos(L_TORUS / 2))                 # 53.13
EDGE_DEG = math.degrees(math.acos(L_TORUS * math.sqrt(2) / 2))  # 31.95


def torus_directions():
    faces = np.eye(3)
    edges = np.array([[1, 1, 0], [1, -1, 0], [1, 0, 1], [1, 0, -1], [0, 1, 1], [0, 1, -1]]) / math.sqrt(2)
    return faces, edges


def match_pair(row, directions, tol_deg):
    """Index of the +/- direction pair this candidate's centres sit on, or -1."""
    c1 = rings.lonlat_to_vec(row["lon1_deg"], row["lat1_deg"])
    c2 = rings.lonlat_to_vec(row["lon2_deg"], row["lat2_deg"])
    for n, d in enumerate(directions):
        for s in (1, -1):
            if rings.separation_deg(c1, s * d) < tol_deg and rings.separation_deg(c2, -s * d) < tol_deg:
                return n
    return -1


@pytest.fixture(scope="module")
def torus_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("torus")
    m = periodic_field_on_sphere((L_TORUS,) * 3, 64, kmax=140, seed=11)
    hp.write_map(str(tmp / "sky.fits"), m, column_units="uK", overwrite=True, dtype=np.float64)
    cfg = {
        "map": {"path": "sky.fits"},
        "prepare": {"nside": 64, "fwhm_deg": 3.0, "lmax": 128},
        "search": {"family": "antipodal", "nside_centers": 32, "radius_deg": [25, 80, 1], "top": 20},
        "output": {"dir": str(tmp / "out")},
        "compute": {"progress": False},
    }
    (tmp / "run.yaml").write_text(yaml.safe_dump(cfg))
    status = cli.main(["search", str(tmp / "run.yaml")])
    assert status == 0
    return tmp


def test_torus_face_and_edge_pairs_lead_the_table(torus_run):
    cand = Table.read(torus_run / "out" / "candidates.ecsv")
    faces, edges = torus_directions()
    # uncalibrated, the table ranks by grid S, which chance inflates on small circles (common practice, no
    # source): the three face pairs lead, and the six edge pairs are among the next seven, each exactly once
    assert sorted(match_pair(r, faces, 3.0) for r in cand[:3]) == [0, 1, 2]
    top10 = cand[:10]
    face_hits = [match_pair(r, faces, 3.0) for r in top10]
    edge_hits = [match_pair(r, edges, 3.0) for r in top10]
    assert sorted(h for h in edge_hits if h >= 0) == [0, 1, 2, 3, 4, 5]
    assert np.all(np.diff(cand["s_grid"]) <= 0)
    top = top10[(np.asarray(face_hits) >= 0) | (np.asarray(edge_hits) >= 0)]
    face_hits = [match_pair(r, faces, 3.0) for r in top]
    edge_hits = [match_pair(r, edges, 3.0) for r in top]
    for r, f, e in zip(top, face_hits, edge_hits):
        expected = FACE_DEG if f >= 0 else EDGE_DEG
        assert r["radius_deg"] == pytest.approx(expected, abs=1.0)
        assert bool(r["flip"]) is True
        assert min(r["twist_deg"], 360 - r["twist_deg"]) < 3.0   # translation: twist 0
        assert r["s"] > 0.85
        assert r["separation_deg"] == pytest.approx(180.0, abs=1e-6)
    # the strongest chance pair is far weaker in refined s
    chance = [r["s"] for r in cand if match_pair(r, faces, 3.0) < 0 and match_pair(r, edges, 3.0) < 0]
    assert max(chance) < top["s"].min() - 0.1
    # provenance travels with the table
    assert cand.meta["tool"] == "twinring" and "config_hash" in cand.meta and "sha256_map" in cand.meta


def test_peaks_table_and_fits_twin(torus_run):
    peaks = Table.read(torus_run / "out" / "peaks.ecsv")
    assert len(peaks) == 2 * 56
    flip_true = peaks[peaks["flip"]]
    best = flip_true[np.argmax(flip_true["s"])]
    assert best["radius_deg"] in (52.0, 53.0, 54.0, 31.0, 32.0, 33.0)
    twin = Table.read(torus_run / "out" / "candidates.fits")
    np.testing.assert_allclose(twin["s"], Table.read(torus_run / "out" / "candidates.ecsv")["s"], atol=1e-6)


def test_rerun_on_same_dir_keeps_results_and_other_config_is_refused(torus_run, capsys):
    out = torus_run / "out"
    before = (out / "candidates.ecsv").read_text()
    cfg = yaml.safe_load((torus_run / "run.yaml").read_text())
    cfg["search"]["top"] = 5
    (torus_run / "other.yaml").write_text(yaml.safe_dump(cfg))
    assert cli.main(["search", str(torus_run / "other.yaml")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "another config" in err[0] and "--force" in err[0]
    assert (out / "candidates.ecsv").read_text() == before


def test_gaussian_sky_stays_below_torus_faces(torus_sky):
    # an isotropic Gaussian sky (healpy.synfast, flat l(l+1)C_l as Sachs-Wolfe predicts for n_s = 1,
    # Sachs & Wolfe 1967) searched at radii >= 45 deg stays clearly below the torus's face pairs
    lmax = 128
    ell = np.arange(lmax + 1)
    cl = np.where(ell >= 2, 1.0 / np.maximum(ell * (ell + 1), 1), 0.0)
    np.random.seed(21)
    g = hp.synfast(cl, 64, lmax=lmax)
    gauss = prepared_from_map(g / g.std() * 30, lmax, 3.0)
    sc = SearchSection(family="antipodal", nside_centers=32, radius_deg=(45.0, 79.0, 2.0), top=5, refine=False)
    _, pool_g, cand_g, _ = search.run_search(gauss, sc)
    _, pool_t, cand_t, _ = search.run_search(torus_sky, sc)
    face_s = np.sort(cand_t["s"])[::-1][:3]
    assert cand_g["s"].max() < face_s.min() - 0.1


def test_general_search_finds_half_turn_pair_off_axis():
    # E2 with translations 2.5 along x and y and a half turn about z with translation 1.2 along z,
    # seen from (0.3, 0, 0): g x0 - x0 = (-0.6, 0, 1.2), d = 1.342, so alpha = 47.87 deg and the
    # centres (-0.6, 0, +-1.2)/d lie 126.87 deg apart (CSS 1998 geometry); a half turn is a screw
    # motion, flip = True (Weeks).
    m = periodic_field_on_sphere((2.5, 2.5, 2.4), 64, kmax=140, seed=4, observer=(0.3, 0, 0), half_turn=True)
    p = prepared_from_map(m, 128, 3.0)
    sc = SearchSection(family="general", nside_centers=16, radius_deg=(40.0, 56.0, 1.0),
                       separation_deg=(120.0, 135.0), top=5)
    _, pool, cand, _ = search.run_search(p, sc)
    best = cand[0]
    c1 = rings.unit(np.array([-0.6, 0, 1.2]))
    c2 = rings.unit(np.array([-0.6, 0, -1.2]))
    got1 = rings.lonlat_to_vec(best["lon1_deg"], best["lat1_deg"])
    got2 = rings.lonlat_to_vec(best["lon2_deg"], best["lat2_deg"])
    d_direct = max(rings.separation_deg(got1, c1), rings.separation_deg(got2, c2))
    d_swapped = max(rings.separation_deg(got1, c2), rings.separation_deg(got2, c1))
    assert min(d_direct, d_swapped) < 3.0
    assert best["radius_deg"] == pytest.approx(47.87, abs=1.0)
    assert best["separation_deg"] == pytest.approx(126.87, abs=2.0)
    assert bool(best["flip"]) is True
    assert best["s"] > 0.85 and best["s"] > cand[1]["s"] + 0.1


def test_masked_torus_still_shows_its_pairs(torus_sky):
    # A band mask of +-15 deg about the equator: sums run over samples valid on both circles
    # (masked S, MATH.md section 2); the torus pairs (CSS 1998) keep S near 1.
    nside = 64
    theta, _ = hp.pix2ang(nside, np.arange(hp.nside2npix(nside)))
    mask = (np.abs(90 - np.degrees(theta)) > 15).astype(float)
    import types
    p = types.SimpleNamespace(alm=torus_sky.alm, lmax=torus_sky.lmax, mask=mask, nside=nside)
    sc = SearchSection(family="antipodal", nside_centers=32, radius_deg=(51.0, 55.0, 1.0), top=6)
    _, pool, cand, _ = search.run_search(p, sc)
    faces, _ = torus_directions()
    hits = sorted(match_pair(r, faces, 4.0) for r in cand[:3])
    assert hits == [0, 1, 2]
    assert np.all(cand[:3]["s"] > 0.85) and np.all(cand[:3]["flip"])


def test_listed_pairs_are_scanned_over_radius(torus_sky):
    # family 'listed': the pairs of a table (here two torus face/edge directions and one unrelated
    # pair) scanned over radius: the true pairs peak at their CSS 1998 radii.
    t = Table({"lon1_deg": [0.0, 45.0, 10.0], "lat1_deg": [0.0, 0.0, 20.0],
               "lon2_deg": [180.0, 225.0, 190.0], "lat2_deg": [0.0, 0.0, -20.0]})
    sc = SearchSection(family="listed", listed="pairs.ecsv", radius_deg=(25.0, 80.0, 1.0), top=3)
    plan, pool, cand, peaks = search.run_search(torus_sky, sc, listed_table=t)
    assert pool.pairs_scanned == 3 * 56
    got = sorted(float(r) for r in cand[:2]["radius_deg"])
    assert got == pytest.approx([EDGE_DEG, FACE_DEG], abs=1.0)
    assert np.all(cand[:2]["s"] > 0.85)
    # refinement stays inside the scanned radii (no drift to tiny, all-gradient circles)
    assert np.all(cand["radius_deg"] >= 24.0)
    assert cand[2]["s"] < 0.75


def test_ring_cache_never_serves_another_sky(torus_sky):
    # two different skies through plans with the same key: each gets its own rings
    import types
    sc = SearchSection(family="antipodal", nside_centers=8, radius_deg=(50.0, 50.0, 1.0), top=1, refine=False)
    results = []
    import gc
    for scale in (1.0, -1.0):
        p = types.SimpleNamespace(alm=torus_sky.alm * scale, lmax=torus_sky.lmax, mask=None, nside=64)
        plan = search.make_plan(p, sc, key="same")
        results.append(search.ring_set(plan, 0).b.copy())
        del p, plan      # the first sky's arrays die, so their ids may be handed to the second
        gc.collect()
    np.testing.assert_allclose(results[1], -results[0], atol=1e-4)


def test_grid_retention_matches_a_torus_measurement():
    # CSS 1998 geometry: the face pair of a cubic torus (L = 1.2 chi) lies along +-x at 53.13 deg. Moving both
    # circles off the true circle by delta (radius and centre) lowers S by about the map's own correlation at the
    # matched samples' lag 2 delta, xi(2 delta)/xi(0) (xi from healpy.alm2cl through Legendre sums, numpy);
    # measured here on the torus sky, with both weightings
    m = periodic_field_on_sphere((L_TORUS,) * 3, 64, kmax=140, seed=11)
    prepared = prepared_from_map(m, lmax=128, fwhm_deg=3.0)
    prepared.fwhm_deg = 3.0
    for weighting in ("m", "flat"):
        _retention_case(prepared, weighting)
    # a coarse grid is flagged, a fine one is not
    coarse = SearchSection(nside_centers=8, radius_deg=(20.0, 80.0, 5.0))
    assert "coarse grid" in search.grid_warning(prepared, coarse)
    assert search.grid_warning(prepared, SearchSection(nside_centers=64, radius_deg=(20.0, 80.0, 0.5))) is None


def _retention_case(prepared, weighting):
    scfg = SearchSection(nside_centers=16, radius_deg=(40.0, 60.0, 1.0), weighting=weighting)
    plan = search.make_plan(prepared, scfg, None, None, key=f"retention-{weighting}")
    x = np.array([1.0, 0.0, 0.0])
    s_true = search.pair_statistic(plan, x, -x, FACE_DEG)[1][0]
    assert s_true > 0.9
    for dr, dc in ((2.0, 0.0), (0.0, 3.0), (3.0, 3.0), (5.0, 7.3)):
        delta, keep = search.grid_retention(prepared.alm, prepared.lmax, dr, dc)
        tilt = math.radians(0.5 * dc)
        c1 = np.array([math.cos(tilt), math.sin(tilt), 0.0])
        measured = np.mean([search.pair_statistic(plan, c1, -c1, FACE_DEG + sgn * 0.5 * dr)[1][0]
                            for sgn in (-1, 1)]) / s_true
        assert measured == pytest.approx(keep, abs=0.12), (weighting, dr, dc, delta, keep, measured)


def test_nelder_mead_steps_follow_scipy():
    # the lockstep Nelder-Mead takes scipy.optimize.minimize's steps exactly (Rosenbrock 1960 function,
    # a shifted quadratic, and a run cut short by maxfev)
    from scipy.optimize import minimize, rosen

    def run(fun, simplex, **opt):
        gen = search.nelder_mead_steps(simplex, opt["xatol"], opt["fatol"], opt["maxfev"])
        x = next(gen)
        try:
            while True:
                x = gen.send(fun(x))
        except StopIteration as stop:
            return stop.value

    quad = lambda x: float(np.sum((x - np.array([0.3, -1.2, 2.0])) ** 2))
    for fun, n, opt in ((rosen, 3, dict(xatol=1e-6, fatol=1e-8, maxfev=2000)),
                        (quad, 3, dict(xatol=0.02, fatol=1e-4, maxfev=120)),
                        (rosen, 5, dict(xatol=1e-8, fatol=1e-10, maxfev=37))):
        simplex = np.vstack([np.zeros(n), 0.4 * np.eye(n)])
        ref = minimize(fun, np.zeros(n), method="Nelder-Mead", options=dict(initial_simplex=simplex, **opt))
        x, f = run(fun, simplex, **opt)
        assert np.array_equal(x, ref.x) and f == ref.fun


@pytest.mark.parametrize("masked", [False, True])
def test_batched_refinement_equals_one_at_a_time(torus_sky, masked):
    # all candidates' Nelder-Mead steps batched into one synthesis call per round give the same refined
    # circles as scipy's Nelder-Mead one candidate at a time (1e-6); starts: torus face and edge pairs
    # (CSS 1998 geometry) off the grid, in the general family, and chance pairs
    import types
    mask = None
    if masked:
        theta, _ = hp.pix2ang(64, np.arange(hp.nside2npix(64)))
        mask = (np.abs(90 - np.degrees(theta)) > 15).astype(float)
    p = types.SimpleNamespace(alm=torus_sky.alm, lmax=torus_sky.lmax, mask=mask, nside=64)
    sc = SearchSection(family="general", nside_centers=8, radius_deg=(25.0, 80.0, 1.0), refine=True)
    plan = search.make_plan(p, sc, key=f"batch-{masked}")
    rng = np.random.default_rng(2)
    x = rings.unit(np.array([1.0, 0.04, 0.03]))
    e = rings.unit(np.array([1.0, 0.97, 0.05]))
    starts = [(x, -rings.unit(x + [0.0, 0.03, -0.02]), FACE_DEG + 0.6, 1),
              (e, -rings.unit(e + [0.02, 0.0, 0.02]), EDGE_DEG - 0.4, 1)]
    for _ in range(3):
        a, b = rings.unit(rng.normal(size=(2, 3)))
        starts.append((a, b, float(rng.uniform(30, 70)), int(rng.integers(2))))
    batched = search.refine_candidates(plan, starts, antipodal=False)
    for st, got in zip(starts, batched):
        ref = search.refine_candidate(plan, *st, antipodal=False)
        np.testing.assert_allclose(got[0], ref[0], atol=1e-6)
        np.testing.assert_allclose(got[1], ref[1], atol=1e-6)
        assert got[2] == pytest.approx(ref[2], abs=1e-6) and got[3] == pytest.approx(ref[3], abs=1e-6)
        assert got[4] == pytest.approx(ref[4], abs=1e-6) or not np.isfinite(ref[3])
    assert batched[0][3] > 0.85 and batched[1][3] > 0.85
    anti = search.refine_candidates(plan, [(x, -x, FACE_DEG + 0.6, 1)], antipodal=True)[0]
    ref = search.refine_candidate(plan, x, -x, FACE_DEG + 0.6, 1, antipodal=True)
    np.testing.assert_allclose(anti[0], ref[0], atol=1e-6)
    assert anti[3] == pytest.approx(ref[3], abs=1e-6)
