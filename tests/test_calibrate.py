"""Calibration: Gaussian skies, spectra, extreme-value tails, thresholds and p-values.

Small setup throughout (Nside 32, lmax 64, 4 deg beam, nside_centers 8, radii
20-80 deg every 10 deg) so the whole file runs in well under a minute.
"""
from __future__ import annotations

import math

import numpy as np
import healpy as hp
import pytest
import scipy.stats
from astropy.table import Table

from twinring import calibrate as cal
from twinring import prepare, rings
from twinring.config import InputError, config_from_dict
from twinring.skymap import SkyMap

from conftest import periodic_field_on_sphere

NSIDE, LMAX, FWHM = 32, 64, 4.0


def small_cfg(**calib):
    return config_from_dict({
        "prepare": {"nside": NSIDE, "lmax": LMAX, "fwhm_deg": FWHM},
        "search": {"nside_centers": 8, "radius_deg": [20, 80, 10], "refine": False},
        "calibrate": dict({"simulations": 40}, **calib),
        "compute": {"progress": False},
    })


def sky_of(m, mask=None):
    mask = np.ones_like(m) if mask is None else mask
    return SkyMap(values=m * mask, mask=mask, nside=hp.npix2nside(m.size), unit_in="uK", frame=None, checksum="")


def aligned_rotation():
    """Rotation taking the torus's x and y faces onto two grid centres of nside_centers 8 (on the equator)."""
    c = rings.center_grid(8)
    lon, lat = rings.vec_to_lonlat(c)
    eq = np.abs(lat) < 1e-6
    a = c[np.flatnonzero(eq & (np.abs(lon - 5.625) < 1e-6))[0]]
    b = c[np.flatnonzero(eq & (np.abs(lon - 95.625) < 1e-6))[0]]
    return np.stack([a, b, np.cross(a, b)])


@pytest.fixture(scope="module")
def torus_setup():
    """A cubic torus with face circles at 40 deg (L = 2 cos 40 deg, chi = 1), white noise, its calibration."""
    cfg = small_cfg(simulations=40)
    L = 2 * math.cos(math.radians(40.0))
    m = periodic_field_on_sphere((L, L, L), NSIDE, kmax=80, seed=3, rotation=aligned_rotation())
    m = m + 10.0 * np.random.default_rng(5).standard_normal(m.size)      # 10 uK per pixel against 30 uK rms
    sky = sky_of(m)
    prepared = prepare.prepare_map(sky, cfg.prepare)
    ctx = cal.make_context(cfg, sky, prepared)
    peaks = cal.run_simulations(ctx, 40)
    model = cal.NullModel(np.asarray(cfg.search.radii_deg()), peaks)
    return cfg, prepared, ctx, model


# --------------------------------------------------------------------------- Gaussian skies and spectra
def test_gaussian_alm_has_the_requested_spectrum():
    # reference: healpy.alm2cl; <|a_lm|^2> = C_l for an isotropic Gaussian sky (common practice, no source)
    lmax = 40
    ell = np.arange(lmax + 1)
    cl = np.where(ell >= 2, 1000.0 / np.maximum(ell * (ell + 1), 1), 0.0)
    est = np.mean([hp.alm2cl(cal.gaussian_alm(cl, lmax, cal.sim_rng(3, i))) for i in range(200)], axis=0)
    # 200 realisations: relative error per l about sqrt(2 / ((2l+1) 200)) <= 4.5 % at l = 2
    assert np.all(np.abs(est[2:] / cl[2:] - 1) < 5 * np.sqrt(2.0 / ((2 * ell[2:] + 1) * 200)))
    assert np.all(est[:2] == 0)


def test_seeds_are_per_simulation():
    # SeedSequence(seed).spawn(n)[i] is SeedSequence(seed, spawn_key=(i,)) (numpy reference)
    children = np.random.SeedSequence(7).spawn(5)
    for i in (0, 3, 4):
        a = np.random.default_rng(children[i]).standard_normal(4)
        b = cal.sim_rng(7, i).standard_normal(4)
        assert np.array_equal(a, b)


def test_data_spectrum_recovers_the_sky_spectrum():
    # the prepared map carries the beam; the estimate divides it out (healpy.gauss_beam reference)
    cfg = small_cfg()
    ell = np.arange(LMAX + 1)
    cl = np.where(ell >= 2, 2000.0 / np.maximum(ell * (ell + 1), 1), 0.0)
    rng = cal.sim_rng(11, 0)
    m = hp.alm2map(cal.gaussian_alm(cl, LMAX, rng), NSIDE, lmax=LMAX)
    est_full = cal.data_spectrum(prepare.prepare_map(sky_of(m), cfg.prepare), cfg.prepare)
    # a 30 deg band around the equator masked: f_sky = 0.5
    z = hp.pix2vec(NSIDE, np.arange(m.size))[2]
    mask = (np.abs(z) > 0.5).astype(float)
    est_cut = cal.data_spectrum(prepare.prepare_map(sky_of(m, mask), cfg.prepare), cfg.prepare)
    bins = [(2, 10), (10, 25), (25, 45)]
    for lo, hi in bins:
        ref = hp.alm2cl(hp.map2alm(m, lmax=LMAX, iter=3))[lo:hi].sum()
        assert est_full[lo:hi].sum() / ref == pytest.approx(1.0, rel=0.03)
        assert est_cut[lo:hi].sum() / ref == pytest.approx(1.0, rel=0.35)
    assert np.all(est_full[:2] == 0)


def test_file_spectrum(tmp_path):
    ell = np.arange(0, LMAX + 1)
    cl = np.where(ell >= 2, 1.0 / np.maximum(ell, 1) ** 2, 0.0)
    t = Table({"l": ell, "C_l": cl})
    t.write(tmp_path / "cl.ecsv")
    assert np.allclose(cal.file_spectrum(tmp_path / "cl.ecsv", LMAX), cl)
    np.savetxt(tmp_path / "cl.txt", np.c_[ell, cl])
    assert np.allclose(cal.file_spectrum(tmp_path / "cl.txt", LMAX), cl)
    np.savetxt(tmp_path / "short.txt", np.c_[ell[:20], cl[:20]])
    with pytest.raises(InputError, match="lacks l = 20"):
        cal.file_spectrum(tmp_path / "short.txt", LMAX)
    np.savetxt(tmp_path / "camb.txt", np.c_[ell, cl, 0.1 * cl, 0.01 * cl])    # CAMB's text layout: l, TT, EE, ...
    assert np.allclose(cal.file_spectrum(tmp_path / "camb.txt", LMAX), cl)
    np.savetxt(tmp_path / "one.txt", cl)
    with pytest.raises(InputError, match=r"one.txt: calibrate.spectrum_file has 1 column\(s\); allowed: columns l, C_l"):
        cal.file_spectrum(tmp_path / "one.txt", LMAX)
    (tmp_path / "words.txt").write_text("l C_l\nx y\n")
    with pytest.raises(InputError, match="words.txt: calibrate.spectrum_file is not a numeric text table"):
        cal.file_spectrum(tmp_path / "words.txt", LMAX)
    with pytest.raises(InputError, match="spectrum_file"):
        config_from_dict({"calibrate": {"spectrum": "file"}})
    with pytest.raises(InputError, match="false_alarm"):
        config_from_dict({"calibrate": {"false_alarm": [0.0]}})


# --------------------------------------------------------------------------- extreme-value tails
def test_gumbel_fit_recovers_known_parameters():
    # reference: scipy.stats.gumbel_r; a sample of a known Gumbel law
    rng = np.random.default_rng(2024)
    loc, scale = 0.55, 0.03
    x = scipy.stats.gumbel_r(loc, scale).rvs(size=3000, random_state=rng)
    fit = cal.fit_tail(x, "gumbel")
    assert fit.params[0] == pytest.approx(loc, abs=3 * scale / math.sqrt(3000) * 1.5)
    assert fit.params[1] == pytest.approx(scale, rel=0.05)
    assert fit.ks_p > 0.01
    # the fitted tail (descriptive only: p_global_tail, fig_null) matches the true law beyond the sample
    true = scipy.stats.gumbel_r(loc, scale)
    assert fit.isf(1e-4) == pytest.approx(true.isf(1e-4), abs=0.01)
    assert fit.sf(true.isf(1e-5)) == pytest.approx(1e-5, rel=0.5)
    # a normal sample is no Gumbel: the KS check says so
    bad = cal.fit_tail(np.abs(rng.standard_normal(3000)), "gumbel")
    assert bad.ks_p < 1e-3


def test_genextreme_fit_recovers_a_gumbel_like_law():
    # reference: scipy.stats.genextreme with shape c = 0 is the Gumbel law
    rng = np.random.default_rng(99)
    x = scipy.stats.genextreme(0.0, 0.5, 0.03).rvs(size=3000, random_state=rng)
    fit = cal.fit_tail(x, "genextreme")
    assert abs(fit.params[0]) < 0.06
    assert fit.params[1] == pytest.approx(0.5, abs=0.003)
    assert fit.params[2] == pytest.approx(0.03, rel=0.06)


# --------------------------------------------------------------------------- the null model
def isotropic_peaks(n, seed):
    """Grid peaks of n isotropic skies with a fixed spectrum (500 uK-arcmin noise) and the radii."""
    cfg = small_cfg()
    ell = np.arange(LMAX + 1)
    cl = np.where(ell >= 2, 3000.0 / np.maximum(ell * (ell + 1), 1), 0.0)
    ctx = cal.SimContext(cl=cl, nside=NSIDE, mask=None, noise_sigma=cal.noise_sigma_pixel(500.0, NSIDE),
                         prep=cfg.prepare, search=cfg.search, seed=seed, key=f"isotropic-{seed}")
    return np.asarray(cfg.search.radii_deg()), cal.run_simulations(ctx, n)


@pytest.fixture(scope="module")
def null_split():
    """Isotropic skies with a fixed spectrum: 40 for calibration, 40 held out."""
    radii, peaks = isotropic_peaks(80, 21)
    return radii, peaks[:40], peaks[40:]


def test_null_p_global_of_the_best_is_uniform(null_split):
    # under the null the global p of each held-out isotropic sky's best cell is uniform (Kolmogorov-Smirnov
    # against U(0, 1), scipy.stats.kstest; 40 fresh skies that are not calibration simulations)
    radii, calib, held = null_split
    model = cal.NullModel(radii, calib)
    cells = [(ir, f) for ir in range(radii.size) for f in (0, 1)]
    best = [min(model.p_global(ir, f, sky[ir, f]) for ir, f in cells) for sky in held]
    assert scipy.stats.kstest(best, "uniform").pvalue > 0.01
    lo, hi = scipy.stats.binom.interval(0.99, len(best), 0.1)
    assert lo <= np.sum(np.asarray(best) <= 0.1) <= hi
    # the local p of the best is far from uniform: the look-elsewhere effect is real and corrected
    local = [min(model.p_local(ir, f, sky[ir, f])[0] for ir, f in cells) for sky in held]
    assert scipy.stats.kstest(local, "uniform").pvalue < 0.01
    assert np.median(local) < np.median(best)
    # and nothing is below the Monte Carlo floor 1/(N+1) (Davison & Hinkley 1997, ch. 4)
    assert min(best) >= 1 / 41 - 1e-12 and min(local) >= 1 / 41 - 1e-12


def test_thresholds_rise_toward_small_radii(null_split):
    # fewer independent samples on small circles: the null maxima of S are larger there
    # (common practice, no source)
    radii, calib, _ = null_split
    model = cal.NullModel(radii, calib)
    t = model.thresholds_table([0.01, 0.05])
    assert not np.any(t["usable"][t["false_alarm"] == 0.01])          # 40 simulations cannot resolve 1 %
    assert np.all(np.isnan(t["s_threshold"][t["false_alarm"] == 0.01]))
    for f in (False, True):
        sel = (t["flip"] == f) & (t["false_alarm"] == 0.05)
        thr = np.asarray(t["s_threshold"][sel])
        r = np.asarray(t["radius_deg"][sel])
        assert thr[r <= 30].min() > thr[r >= 60].max()
        assert scipy.stats.spearmanr(r, thr).statistic < -0.8
        glob = np.asarray(t["s_threshold_global"][sel])
        # a family-wise threshold is never below the local one (common practice, no source)
        assert np.all(glob >= thr) and np.mean(glob - thr) > 0.01
    assert t["n_sims"].min() == 40


def test_table_round_trip(null_split):
    radii, calib, _ = null_split
    model = cal.NullModel(radii, calib)
    again = cal.null_model_from_table(model.null_table())
    assert np.array_equal(again.peaks, model.peaks)
    assert again.threshold(3, 1, 0.05, "global") == model.threshold(3, 1, 0.05, "global")


def test_torus_is_significant_and_gaussian_sky_is_not(torus_setup):
    # CSS 1998 geometry: a cubic torus of side L = 2 cos(40 deg) chi shows back-to-back circles of radius 40 deg
    # (translation: flip true); with the data's processing and 40 calibration skies its peak has p_global = 1/41
    cfg, prepared, ctx, model = torus_setup
    _, pool = cal.grid_peaks(prepared, cfg.search, key="torus-data")
    ir = model.radius_index(40.0)
    p = model.p_global(ir, 1, pool.peak_s[ir, 1])
    assert p == pytest.approx(1 / 41), (pool.peak_s[ir], p)            # the floor: beyond every simulation
    best = min((model.p_global(i, f, pool.peak_s[i, f]), -model.z(i, f, pool.peak_s[i, f]), i, f)
               for i in range(len(model.radii)) for f in (0, 1))
    assert best[2:] == (ir, 1)
    # an isotropic sky with the same processing (held-out simulation) is not
    iso = cal.null_peaks(ctx, 500)
    p_iso = min(model.p_global(i, f, iso[i, f]) for i in range(len(model.radii)) for f in (0, 1))
    assert p_iso > 0.05


def test_annotate_adds_p_values(torus_setup):
    cfg, prepared, ctx, model = torus_setup
    t = Table({"radius_deg": [40.2, 40.0, 70.0, 20.0], "flip": [True, True, False, False],
               "s_grid": [0.95, 0.7, 0.5, 0.5], "s": [0.97, 0.71, 0.52, 0.5]})
    out = cal.annotate(t, model, level=0.05)
    assert {"z", "p_local", "p_global", "beyond_sims", "p_global_tail", "significant"} <= set(out.colnames)
    # rows come in the calibrated ranking: p_global, then z
    assert list(out["s_grid"][:2]) == [0.95, 0.7]
    assert np.all(np.diff(out["p_global"]) >= 0)
    assert out["p_global"][0] <= out["p_global"][1]            # larger S, no larger p at the same radius
    assert out["z"][0] > out["z"][1]
    assert out["p_local"][0] == model.p_local(model.radius_index(40.0), 1, 0.95)[0]
    assert np.all(out["p_global"] >= out["p_local"])           # looking everywhere costs significance
    assert bool(out["beyond_sims"][0]) and out["p_local"][0] == pytest.approx(1 / 41)
    by_s = {float(r["s_grid"]) if r["radius_deg"] != 20.0 else -1.0: r for r in out}
    assert by_s[-1.0]["p_local"] > by_s[0.5]["p_local"]        # the same S is less rare at small radii
    assert cal.best_global(out)["s_grid"] == 0.95
    assert bool(out["significant"][0]) and not np.any(out["significant"][2:])
    # at a level 40 simulations cannot resolve, nothing is significant
    assert not np.any(cal.annotate(t, model, level=0.01)["significant"])


@pytest.mark.timeout(900)
def test_masked_torus_face_pairs_outrank_chance_circles():
    # CSS 1998 geometry: a cubic torus of side L = 2 cos(40 deg) chi shows three back-to-back face pairs of radius
    # 40 deg (flip true). Behind a 10 deg galactic-like band mask, refinement could move chance circles into the
    # mask; the face pairs on the centre grid (x and y; the z face is 3.4 deg off this nside_centers 8 grid, which
    # grid_warning flags) must rank first, uncalibrated (grid S) and calibrated
    # (p_global, 40 simulations), beyond every simulation (p_global = 1/41, the Monte Carlo floor)
    cfg = config_from_dict({
        "prepare": {"nside": NSIDE, "lmax": LMAX, "fwhm_deg": FWHM},
        "search": {"nside_centers": 8, "radius_deg": [20, 80, 10], "refine": True, "top": 10},
        "calibrate": {"simulations": 40, "seed": 5}, "compute": {"progress": False}})
    L = 2 * math.cos(math.radians(40.0))
    rot = aligned_rotation()
    m = periodic_field_on_sphere((L, L, L), NSIDE, kmax=80, seed=8, rotation=rot)
    m = m + 10.0 * np.random.default_rng(9).standard_normal(m.size)
    _, lat = rings.vec_to_lonlat(np.array(hp.pix2vec(NSIDE, np.arange(m.size))).T)
    mask = (np.abs(lat) > 10.0).astype(float)
    sky = sky_of(m, mask)
    prepared = prepare.prepare_map(sky, cfg.prepare)
    from twinring import search as search_mod

    _, _, cand, _ = search_mod.run_search(prepared, cfg.search, cfg.compute, None, key="masked-torus")
    faces = rot                                   # rows: the torus axes on the sky
    def face_of(row):
        a = rings.lonlat_to_vec(row["lon1_deg"], row["lat1_deg"])
        hit = np.flatnonzero(np.abs(faces @ np.ravel(a)) > math.cos(math.radians(8.0)))
        return int(hit[0]) if hit.size and abs(row["radius_deg"] - 40.0) < 6 and row["flip"] else -1

    assert sorted(face_of(r) for r in cand[:2]) == [0, 1]               # uncalibrated: grid S
    assert np.all(np.diff(cand["s_grid"]) <= 0)
    assert search_mod.grid_warning(prepared, cfg.search) is not None
    ctx = cal.make_context(cfg, sky, prepared)
    model = cal.NullModel(np.asarray(cfg.search.radii_deg()), cal.run_simulations(ctx, 40))
    ranked = cal.annotate(cand, model, level=0.05)
    assert sorted(face_of(r) for r in ranked[:2]) == [0, 1]             # calibrated: p_global order
    assert np.allclose(ranked["p_global"][:2], 1 / 41) and np.all(ranked["p_global"][2:] > 1 / 41)
    assert np.all(ranked["p_global"] >= ranked["p_local"])
    assert list(ranked["rank"]) == list(range(1, len(ranked) + 1))


@pytest.mark.slow
def test_null_p_global_is_uniform_on_120_fresh_skies():
    # the full-size version of test_null_p_global_of_the_best_is_uniform: 40 calibration simulations, 120 fresh
    # isotropic skies (other seeds); Kolmogorov-Smirnov against U(0, 1) (scipy.stats.kstest) and the fraction
    # below 0.1 inside its binomial 99 % interval; nothing below 1/(N+1) (Davison & Hinkley 1997, ch. 4)
    radii, peaks = isotropic_peaks(160, 77)
    model = cal.NullModel(radii, peaks[:40])
    cells = [(ir, f) for ir in range(radii.size) for f in (0, 1)]
    best = np.array([min(model.p_global(ir, f, sky[ir, f]) for ir, f in cells) for sky in peaks[40:]])
    assert scipy.stats.kstest(best, "uniform").pvalue > 0.01
    lo, hi = scipy.stats.binom.interval(0.99, best.size, 0.1)
    assert lo <= np.sum(best <= 0.1) <= hi
    assert best.min() >= 1 / 41 - 1e-12


def test_six_simulations_claim_nothing_on_a_masked_isotropic_sky(tmp_path, capsys):
    # the end-to-end rule on a held-out masked isotropic sky (healpy.synfast, seeded) calibrated with 6
    # simulations: no p below 1/7 (Monte Carlo floor, Davison & Hinkley 1997), p_global >= p_local and global
    # thresholds >= local ones (a family-wise correction only raises them; common practice, no source), no
    # threshold usable at 1 % or 5 %, nothing significant, and the summary says how many simulations are needed
    import yaml

    from twinring import cli

    ell = np.arange(LMAX + 1)
    cl = np.where(ell >= 2, 3000.0 / np.maximum(ell * (ell + 1), 1), 0.0)
    np.random.seed(1234)
    m = hp.synfast(cl, NSIDE, lmax=LMAX)
    _, lat = rings.vec_to_lonlat(np.array(hp.pix2vec(NSIDE, np.arange(m.size))).T)
    m[np.abs(lat) < 12.0] = hp.UNSEEN
    hp.write_map(str(tmp_path / "iso.fits"), m, column_units="uK", dtype=np.float64)
    cfg = {"map": {"path": "iso.fits"}, "prepare": {"nside": NSIDE, "lmax": LMAX, "fwhm_deg": FWHM},
           "search": {"nside_centers": 8, "radius_deg": [20, 80, 10], "refine": True, "top": 10},
           "calibrate": {"simulations": 6, "false_alarm": [0.01, 0.05], "seed": 2},
           "compute": {"progress": False}, "output": {"dir": str(tmp_path / "out")}}
    (tmp_path / "iso.yaml").write_text(yaml.safe_dump(cfg))
    assert cli.main(["search", str(tmp_path / "iso.yaml")]) == 0
    assert cli.main(["calibrate", str(tmp_path / "iso.yaml")]) == 0
    out = capsys.readouterr().out
    assert "not resolved by 6 simulations (needs at least 99)" in out
    assert "nothing can be called significant at 0.05 with 6 simulations (needs at least 19)" in out
    for name in ("peaks.ecsv", "candidates.ecsv"):
        t = Table.read(tmp_path / "out" / name)
        assert t.meta["calibration_n_sims"] == 6
        assert np.all(t["p_local"] >= 1 / 7 - 1e-12) and np.all(t["p_global"] >= 1 / 7 - 1e-12)
        assert np.all(t["p_global"] >= t["p_local"])
        assert not np.any(t["significant"])
    thr = Table.read(tmp_path / "out" / "thresholds.ecsv")
    assert not np.any(thr["usable"])
    assert np.all(np.isnan(thr["s_threshold"])) and np.all(np.isnan(thr["s_threshold_global"]))


def test_sim_nside_defaults_to_prepared_resolution():
    # common practice, no source: map2alm is accurate for lmax <= 2 Nside; the search sees only l <= prepare.lmax
    cfg = small_cfg()                                         # prepare.nside 32, lmax 64
    assert cal.sim_nside_for(cfg, 2048) == 32                 # not the input Nside
    up = config_from_dict({"prepare": {"nside": 64, "lmax": 64, "fwhm_deg": FWHM}})
    assert cal.sim_nside_for(up, 32) == 32                    # never finer than the input map
    fine = config_from_dict({"prepare": {"nside": 32, "lmax": 90, "fwhm_deg": FWHM}})
    assert cal.sim_nside_for(fine, 2048) == 64                # 2 * 32 < 90: the next power of two
    given = config_from_dict({"prepare": {"nside": 32, "lmax": 64, "fwhm_deg": FWHM}, "calibrate": {"sim_nside": 128}})
    assert cal.sim_nside_for(given, 2048) == 128


def test_simulation_threads_leave_peaks_unchanged(torus_setup):
    # calibration passes compute.threads to the search plan; grid peaks do not depend on the thread count
    cfg, prepared, ctx, model = torus_setup
    two = config_from_dict({"prepare": {"nside": NSIDE, "lmax": LMAX, "fwhm_deg": FWHM},
                            "search": {"nside_centers": 8, "radius_deg": [20, 80, 10], "refine": False},
                            "compute": {"threads": 2, "progress": False}})
    assert ctx.compute.threads == cfg.compute.threads
    plan, pool2 = cal.grid_peaks(prepared, two.search, key="t2", compute=two.compute)
    assert plan.threads == 2
    _, pool1 = cal.grid_peaks(prepared, cfg.search, key="t1")
    assert np.array_equal(pool1.peak_s, pool2.peak_s)
    import dataclasses
    p2 = cal.null_peaks(dataclasses.replace(ctx, compute=two.compute), 7)
    assert np.array_equal(p2, cal.null_peaks(ctx, 7))
