"""Real survey inputs: I, Q, U files, units and frames in provenance, B_l beam files, pixel windows,
mask widening, the mode-coupling corrected data spectrum, supplied simulation maps, per-pixel noise.

Every check is against something outside twinring: healpy (read_map, gauss_beam, pixwin, anafast),
sympy's Wigner 3j symbols, scipy.stats (chi-square) and direct angular distances (numpy).
pymaster (NaMaster) has no wheel for this machine (PyPI offers only its source, which needs
GSL/FFTW/cfitsio to build), so the coupled spectrum is checked against healpy Monte Carlo averages.
"""
from __future__ import annotations

import math

import numpy as np
import healpy as hp
import pytest
import scipy.stats
from astropy.io import fits
from astropy.table import Table

from twinring import calibrate as cal
from twinring import cli, prepare
from twinring.config import InputError, config_from_dict
from twinring.results import provenance
from twinring.skymap import SkyMap, load_map, load_noise_variance, regrid_variance

NSIDE, LMAX = 32, 64


def gauss_map(nside, lmax, seed, amp=1e3):
    ell = np.arange(lmax + 1)
    cl = np.where(ell >= 2, amp / np.maximum(ell * (ell + 1), 1), 0.0)
    return hp.alm2map(cal.gaussian_alm(cl, lmax, cal.sim_rng(seed, 0)), nside, lmax=lmax), cl


def iqu_file(path, nside=16, seed=1, unit="K_CMB", nest=True, coord="G"):
    """An I, Q, U map (Planck-style names, K_CMB, NESTED) written with healpy."""
    rng = np.random.default_rng(seed)
    maps = [rng.normal(0, 1e-4, hp.nside2npix(nside)) for _ in range(3)]
    hp.write_map(str(path), [hp.reorder(m, r2n=True) for m in maps] if nest else maps, nest=nest, coord=coord,
                 column_names=["I_STOKES", "Q_STOKES", "U_STOKES"], column_units=unit, dtype=[np.float64] * 3,
                 overwrite=True)
    return maps


# --------------------------------------------------------------------------- fields, units, provenance
def test_polarisation_column_refused_unless_asked(tmp_path):
    f = tmp_path / "iqu.fits"
    maps = iqu_file(f)
    # reference: healpy.read_map (RING order, file units) times 1e6 for K -> uK
    ref_q = hp.read_map(str(f), field=1, dtype=np.float64)
    for field in (1, "Q_STOKES", "q_stokes"):
        with pytest.raises(InputError) as e:
            load_map(f, field=field)
        msg = str(e.value)
        assert "\n" not in msg and msg.startswith(str(f)) and "Q_STOKES" in msg and "allow_polarisation" in msg
    q = load_map(f, field="Q_STOKES", allow_polarisation=True)
    np.testing.assert_allclose(q.values, ref_q * 1e6, rtol=1e-12)
    assert any("polarisation" in n for n in q.notes)
    # temperature names find the temperature column, whatever its name among the aliases
    for field in (0, "I_STOKES", "TEMPERATURE", "T"):
        s = load_map(f, field=field)
        np.testing.assert_allclose(s.values, maps[0] * 1e6, rtol=1e-12)
        assert s.column == "I_STOKES" and s.ordering == "NESTED" and s.frame == "G" and s.unit_in == "K_CMB"
    with pytest.raises(InputError, match="I_STOKES"):
        load_map(f, field="SYNCHROTRON")


def test_brightness_temperature_refused_with_reason(tmp_path):
    f = tmp_path / "rj.fits"
    hp.write_map(str(f), np.ones(hp.nside2npix(8)), column_units="K_RJ", overwrite=True)
    with pytest.raises(InputError, match="Rayleigh-Jeans") as e:
        load_map(f)
    assert "K_CMB" in str(e.value)


def test_field_config_key_and_provenance(tmp_path):
    f = tmp_path / "iqu.fits"
    iqu_file(f)
    cfg = config_from_dict({"map": {"path": str(f), "field": "I_STOKES"}})
    meta = provenance(cfg, {"map": cfg.map.path}, "search")
    assert meta["map_unit"] == "K_CMB" and meta["map_unit_to_uK"] == 1e6
    assert meta["map_ordering"] == "NESTED" and meta["map_frame"] == "G"
    assert meta["map_field"] == "0 (I_STOKES)"
    with pytest.raises(InputError, match="map.field"):
        config_from_dict({"map": {"field": -1}})
    # a map without TUNIT and COORDSYS says so
    g = tmp_path / "plain.fits"
    hp.write_map(str(g), np.ones(hp.nside2npix(8)), overwrite=True)
    m2 = provenance(config_from_dict({"map": {"path": str(g)}}), None, "search")
    assert "uK assumed" in m2["map_unit"] and "not declared" in m2["map_frame"]


def test_iqu_kcmb_nested_run_records_input_everywhere(tmp_path):
    """End to end: an I, Q, U K_CMB NESTED map with a mask, searched and calibrated on supplied maps."""
    nside = 16
    f = tmp_path / "iqu.fits"
    iqu_file(f, nside=nside)
    z = hp.pix2vec(nside, np.arange(hp.nside2npix(nside)))[2]
    mask = (np.abs(z) > 0.2).astype(float)
    hp.write_map(str(tmp_path / "mask.fits"), mask, coord="G", overwrite=True)
    for i in range(3):
        iqu_file(tmp_path / f"sim_{i}.fits", nside=nside, seed=10 + i)
    cfg = tmp_path / "run.yaml"
    cfg.write_text(
        "map: {path: iqu.fits, field: I_STOKES, mask: mask.fits}\n"
        "prepare: {nside: 16, lmax: 32, fwhm_deg: 8.0, mask_widen_fwhm: 0.5}\n"
        "search: {nside_centers: 2, radius_deg: [30, 60, 15], refine: false, top: 5}\n"
        "calibrate: {maps: 'sim_*.fits', false_alarm: [0.25]}\n"
        "compute: {progress: false}\n")
    out = tmp_path / "out"
    assert cli.main(["search", str(cfg), "--out", str(out)]) == 0
    assert cli.main(["calibrate", str(cfg), "--out", str(out)]) == 0
    hdr = fits.getheader(out / "prepared.fits", 1)
    assert hdr["MAP_UNIT"] == "K_CMB" and hdr["MAP_FRAME"] == "G" and hdr["COORDSYS"] == "G"
    assert hdr["MAP_ORDERING"] == "NESTED" and hdr["MAP_FIELD"] == "0 (I_STOKES)"
    for name in ("candidates.ecsv", "peaks.ecsv", "thresholds.ecsv", "null_peaks.ecsv"):
        meta = Table.read(out / name, format="ascii.ecsv").meta
        assert meta["map_unit"] == "K_CMB" and meta["map_frame"] == "G", name
        assert meta["map_field"] == "0 (I_STOKES)" and meta["map_ordering"] == "NESTED", name
    thr = Table.read(out / "thresholds.ecsv", format="ascii.ecsv")
    # N is the number of supplied maps (3), not calibrate.simulations (40 by default)
    assert thr.meta["n_sims"] == 3 and thr.meta["sim_maps_count"] == 3
    assert len(thr.meta["sim_maps_checksums"]) == 3 and thr.meta["null_kind"] == "supplied simulation maps"
    cand = Table.read(out / "candidates.ecsv", format="ascii.ecsv")
    assert np.all(cand["p_local"] >= 1 / 4 - 1e-12)        # p never below 1/(N + 1) (README, Significance)
    log = (out / "run.log").read_text() if (out / "run.log").exists() else ""
    if log:
        assert "supplied simulation maps" in log


# --------------------------------------------------------------------------- beams and pixel windows
def test_beam_file_round_trip_and_same_as_fwhm(tmp_path):
    lmax, fwhm = LMAX, 1.5
    bl = hp.gauss_beam(math.radians(fwhm), lmax=lmax + 20)            # reference: healpy.gauss_beam
    Table({"L": np.arange(bl.size), "B_L": bl}).write(tmp_path / "b.fits")
    np.savetxt(tmp_path / "b1.txt", bl)
    np.savetxt(tmp_path / "b2.txt", np.c_[np.arange(bl.size), bl])
    for name in ("b.fits", "b1.txt", "b2.txt"):
        np.testing.assert_allclose(prepare.read_beam(tmp_path / name, lmax), bl[: lmax + 1], rtol=1e-12)
    m, _ = gauss_map(NSIDE, LMAX, 3)
    sky = SkyMap(values=m, mask=np.ones_like(m), nside=NSIDE, unit_in="uK", frame=None, checksum="")
    base = {"nside": NSIDE, "lmax": LMAX, "fwhm_deg": 4.0}
    a = prepare.prepare_map(sky, config_from_dict({"prepare": dict(base, input_fwhm_deg=fwhm)}).prepare)
    b = prepare.prepare_map(sky, config_from_dict({"prepare": dict(base, input_beam=str(tmp_path / "b.fits"))}).prepare)
    np.testing.assert_allclose(b.alm, a.alm, rtol=1e-10, atol=1e-10 * np.abs(a.alm).max())
    # bad beams: short, unnormalised, zero
    np.savetxt(tmp_path / "short.txt", bl[:10])
    with pytest.raises(InputError, match="input_beam"):
        prepare.read_beam(tmp_path / "short.txt", lmax)
    np.savetxt(tmp_path / "three.txt", np.c_[np.arange(bl.size), bl, bl])
    with pytest.raises(InputError, match=r"three.txt: prepare.input_beam has 3 column\(s\); allowed: one column"):
        prepare.read_beam(tmp_path / "three.txt", lmax)
    np.savetxt(tmp_path / "scaled.txt", 2 * bl)
    with pytest.raises(InputError, match="B_0"):
        prepare.read_beam(tmp_path / "scaled.txt", lmax)
    with pytest.raises(InputError, match="input_fwhm_deg"):
        config_from_dict({"prepare": dict(base, input_fwhm_deg=1.0, input_beam="x.txt")})


def test_pixel_window_against_pixel_averages():
    # reference: healpy.ud_grade averages the sub-pixels of a fine map, which is what a pixel does to the sky;
    # regressing the averaged map on the map at the pixel centres gives p_l for a sky of one multipole
    nside = 32
    pw = prepare.pixel_window(nside, 90)
    assert pw[0] == pytest.approx(1.0) and np.all(np.diff(pw[1:]) < 0)
    for l in (20, 64, 90):
        cl = np.zeros(l + 1)
        cl[l] = 1.0
        alm = cal.gaussian_alm(cl, l, cal.sim_rng(2, l))
        avg = hp.ud_grade(hp.alm2map(alm, 1024, lmax=l), nside)
        cen = hp.alm2map(alm, nside, lmax=l)
        assert pw[l] == pytest.approx(np.dot(avg, cen) / np.dot(cen, cen), abs=0.02)


def test_input_pixel_window_divided_out():
    # a pixelised map (sub-pixels averaged by healpy.ud_grade): dividing the pixel window out restores the a_lm
    nside_in, lmax = 32, 64
    ell = np.arange(lmax + 1)
    cl = np.where(ell >= 2, 1e3 / np.maximum(ell * (ell + 1), 1), 0.0)
    alm = cal.gaussian_alm(cl, lmax, cal.sim_rng(4, 0))
    m = hp.ud_grade(hp.alm2map(alm, 512, lmax=lmax), nside_in)
    sky = SkyMap(values=m, mask=np.ones_like(m), nside=nside_in, unit_in="uK", frame=None, checksum="")
    base = {"nside": nside_in, "lmax": lmax, "fwhm_deg": 5.0, "remove_dipole": False}
    with_pw = prepare.prepare_map(sky, config_from_dict({"prepare": dict(base, input_pixwin=True)}).prepare)
    without = prepare.prepare_map(sky, config_from_dict({"prepare": base}).prepare)
    want = hp.almxfl(alm, hp.gauss_beam(math.radians(5.0), lmax=lmax))
    ls, _ = hp.Alm.getlm(lmax)
    hi = ls >= 40
    err_with = np.abs(with_pw.alm[hi] - want[hi]).sum() / np.abs(want[hi]).sum()
    err_without = np.abs(without.alm[hi] - want[hi]).sum() / np.abs(want[hi]).sum()
    assert err_with < 0.5 * err_without and err_without > 0.05   # p_l(32) at l = 40..64: about 0.93..0.83


def test_mask_widening_matches_direct_distances():
    nside = 16
    npix = hp.nside2npix(nside)
    v = np.stack(hp.pix2vec(nside, np.arange(npix)), -1)
    mask = (v[:, 2] < 0.6).astype(float)
    mask[hp.query_disc(nside, hp.ang2vec(1.2, 2.0), math.radians(8))] = 0
    r = 7.0
    got = prepare.widen_mask(mask, r)
    # reference: the angular distance from every pixel centre to the nearest masked centre (numpy)
    masked = v[mask < 0.5]
    nearest = np.degrees(np.arccos(np.clip((v @ masked.T).max(axis=1), -1, 1)))
    want = (mask > 0.5) & (nearest > r + 1e-9)
    assert np.array_equal(got > 0.5, want)
    assert np.array_equal(prepare.widen_mask(mask, 0.0), mask)


# --------------------------------------------------------------------------- mode coupling
def test_wigner_3j_against_sympy():
    from sympy.physics.wigner import wigner_3j

    f = cal.wigner3j_zero_sq(120)
    for t in [(2, 3, 5), (10, 12, 4), (30, 40, 20), (7, 7, 0), (50, 60, 100), (1, 2, 4), (3, 4, 6)]:
        assert f(*t) == pytest.approx(float(wigner_3j(*t, 0, 0, 0)) ** 2, rel=1e-10, abs=1e-300)


def test_coupling_matrix_predicts_masked_pseudo_spectra():
    # <pseudo C_l> = M C_l (Hivon et al. 2002, ApJ 567, 2): against the mean of healpy.anafast over masked skies
    nside, lmax = 16, 47
    z = hp.pix2vec(nside, np.arange(hp.nside2npix(nside)))[2]
    mask = (np.abs(z) > 0.35).astype(float)
    ell = np.arange(lmax + 1)
    cl = np.where(ell >= 2, 1.0 / (ell + 5.0) ** 2, 0.0)
    M = cal.coupling_matrix(hp.anafast(hp.ud_grade(mask, 32), lmax=2 * lmax), lmax)
    n = 300
    pcl = np.mean([hp.anafast(hp.alm2map(cal.gaussian_alm(cl, lmax, cal.sim_rng(9, i)), nside, lmax=lmax) * mask,
                              lmax=lmax) for i in range(n)], axis=0)
    pred = M @ cl
    sl = slice(2, 40)
    # the Monte Carlo mean has relative error about sqrt(2 / ((2l+1) f_sky n)) per l
    tol = 4 * np.sqrt(2.0 / ((2 * ell[sl] + 1) * 0.65 * n)) + 0.02
    assert np.all(np.abs(pcl[sl] / pred[sl] - 1) < tol)
    # f_sky alone is wrong at low l (l = 2..4 together: MC error about 3 %), the coupling matrix is not
    low = slice(2, 5)
    err_fsky = abs(pcl[low].sum() / (mask.mean() * cl[low].sum()) - 1)
    err_master = abs(pcl[low].sum() / pred[low].sum() - 1)
    assert err_fsky > 0.1 and err_master < 0.5 * err_fsky


def test_master_spectrum_recovers_input_and_fsky_does_worse():
    cfg = config_from_dict({"prepare": {"nside": NSIDE, "lmax": LMAX, "fwhm_deg": 4.0, "remove_dipole": False}})
    lfull = 3 * NSIDE - 1
    ell = np.arange(lfull + 1)
    cl = np.where(ell >= 2, 1e3 / np.maximum(ell * (ell + 1), 1), 0.0)
    z = hp.pix2vec(NSIDE, np.arange(hp.nside2npix(NSIDE)))[2]
    mask = (np.abs(z) > math.sin(math.radians(20))).astype(float)
    est = {"master": [], "fsky": []}
    n = 40
    for i in range(n):
        m = hp.alm2map(cal.gaussian_alm(cl, lfull, cal.sim_rng(5, i)), NSIDE, lmax=lfull)
        sky = SkyMap(values=m * mask, mask=mask, nside=NSIDE, unit_in="uK", frame=None, checksum="")
        p = prepare.prepare_map(sky, cfg.prepare)
        for k in est:
            est[k].append(cal.data_spectrum(p, cfg.prepare, coupling=k, sky=sky))
    fsky = mask.mean()
    for lo, hi in [(2, 4), (4, 8), (8, 16), (16, 32), (32, 65)]:
        modes = np.sum(2 * ell[lo:hi] + 1) * fsky * n
        cv = np.sqrt(2.0 / modes)              # cosmic variance of the ensemble mean of a bin (no source needed)
        r_master = np.mean(est["master"], axis=0)[lo:hi].sum() / cl[lo:hi].sum()
        assert abs(r_master - 1) < 3 * cv + 0.02, (lo, hi, r_master)
    r_fsky_low = np.mean(est["fsky"], axis=0)[2:4].sum() / cl[2:4].sum()
    r_master_low = np.mean(est["master"], axis=0)[2:4].sum() / cl[2:4].sum()
    assert abs(r_fsky_low - 1) > 2 * abs(r_master_low - 1)
    assert abs(r_fsky_low - 1) > 0.2


# --------------------------------------------------------------------------- noise
def test_noise_from_variance_map_chi_square(tmp_path):
    nside = 16
    npix = hp.nside2npix(nside)
    theta = hp.pix2ang(nside, np.arange(npix))[0]
    var_k2 = (1e-6 * (5.0 + 20.0 * np.cos(theta) ** 2)) ** 2            # K_CMB^2: 5..25 uK rms
    hp.write_map(str(tmp_path / "var.fits"), var_k2, column_units="K_CMB^2", overwrite=True, dtype=np.float64)
    var, vn, _ = load_noise_variance(tmp_path / "var.fits")
    np.testing.assert_allclose(var, var_k2 * 1e12, rtol=1e-10)
    hits = np.round(1e4 / (5.0 + 20.0 * np.cos(theta) ** 2) ** 2 * 100).astype(float)
    hp.write_map(str(tmp_path / "hits.fits"), hits, overwrite=True, dtype=np.float64)
    vh, _, _ = load_noise_variance(tmp_path / "hits.fits", per_hit_uk=30.0)
    np.testing.assert_allclose(vh, 900.0 / hits)
    m, _ = gauss_map(nside, 40, 2)
    sky = SkyMap(values=m, mask=np.ones(npix), nside=nside, unit_in="uK", frame=None, checksum="")
    cfg = config_from_dict({"prepare": {"nside": nside, "lmax": 40, "fwhm_deg": 6.0},
                            "calibrate": {"spectrum": "file", "spectrum_file": "unused.txt",
                                          "noise_variance_map": str(tmp_path / "var.fits")}})
    sigma, text, checksum = cal.noise_for(cfg, nside)
    assert "inhomogeneous" in text and len(checksum) == 16
    ctx = cal.SimContext(cl=np.zeros(41), nside=nside, mask=None, noise_sigma=sigma, prep=cfg.prepare,
                         search=cfg.search, seed=3)
    noise = cal.simulate_sky(ctx, 0).values          # C_l = 0: the map is the noise alone
    chi2 = np.sum(noise ** 2 / var)
    # reference: scipy.stats.chi2 with one degree of freedom per pixel
    assert scipy.stats.chi2(npix).sf(chi2) > 1e-3 and scipy.stats.chi2(npix).cdf(chi2) > 1e-3
    # per half of the sky (low and high variance) the right variance passes and a white level of the mean fails
    low = var < np.median(var)
    for part in (low, ~low):
        k = int(part.sum())
        good = np.sum(noise[part] ** 2 / var[part])
        white = np.sum(noise[part] ** 2 / var.mean())
        assert 1e-3 < scipy.stats.chi2(k).cdf(good) < 1 - 1e-3
        assert min(scipy.stats.chi2(k).cdf(white), scipy.stats.chi2(k).sf(white)) < 1e-6
    # pixel-area scaling: degrading 4 sub-pixels to one quarters the variance of their mean (healpy.ud_grade)
    np.testing.assert_allclose(regrid_variance(np.full(npix, 4.0), nside // 2), 1.0)
    np.testing.assert_allclose(regrid_variance(np.full(npix, 4.0), nside * 2), 16.0)


# --------------------------------------------------------------------------- supplied simulations
def test_supplied_torus_sims_make_a_torus_unremarkable(tmp_path):
    """A torus sky against supplied torus skies of the same shape is unremarkable; against isotropic ones it is not."""
    from conftest import periodic_field_on_sphere

    nside = 32
    L = 2 * math.cos(math.radians(40.0))
    base = {"prepare": {"nside": nside, "lmax": 48, "fwhm_deg": 5.0},
            "search": {"nside_centers": 4, "radius_deg": [30, 60, 10], "refine": False, "top": 5},
            "compute": {"progress": False}}
    from twinring import rings

    c = rings.center_grid(4)          # put two faces of the cube on grid centres (as tests/test_calibrate.py)
    lon, lat = rings.vec_to_lonlat(c)
    eq = np.flatnonzero(np.abs(lat) < 1e-6)
    a = c[eq[0]]
    b = c[eq[np.argmin(np.abs(c[eq] @ a))]]
    rot = np.stack([a, b, np.cross(a, b)])
    tor = [periodic_field_on_sphere((L, L, L), nside, kmax=60, seed=s, rotation=rot) for s in range(8)]
    for i, m in enumerate(tor[1:]):
        hp.write_map(str(tmp_path / f"torus_{i}.fits"), m, column_units="uK", overwrite=True)
    hp.write_map(str(tmp_path / "data.fits"), tor[0], column_units="uK", overwrite=True)
    data = load_map(tmp_path / "data.fits")
    cfg_t = config_from_dict(dict(base, map={"path": str(tmp_path / "data.fits")},
                                  calibrate={"maps": str(tmp_path / "torus_*.fits")}))
    cfg_g = config_from_dict(dict(base, map={"path": str(tmp_path / "data.fits")},
                                  calibrate={"simulations": 7, "spectrum": "data"}))
    prepared = prepare.prepare_map(data, cfg_t.prepare)
    _, pool = cal.grid_peaks(prepared, cfg_t.search)
    peaks = np.asarray(pool.peak_s, float)
    res = {}
    for name, cfg in (("torus", cfg_t), ("gauss", cfg_g)):
        ctx = cal.make_context(cfg, data, prepared)
        assert ctx.n_sims == 7
        null = cal.run_simulations(ctx, ctx.n_sims)
        model = cal.NullModel(np.asarray(cfg.search.radii_deg(), float), null)
        ir = model.radius_index(40.0)                       # the faces' circles: radius 40 deg
        f = int(np.argmax(peaks[ir]))                       # the sense in which they match (rings.py convention)
        res[name] = model.p_global(ir, f, peaks[ir, f])
    assert res["gauss"] == pytest.approx(1 / 8)            # beyond every isotropic sky: the floor 1/(N + 1)
    assert res["torus"] > 0.25                              # among the torus skies: unremarkable


def test_cut_sky_partial_file_counts_fields_after_its_pixel_column(tmp_path):
    # HEALPix cut-sky convention (common practice, no source): OBJECT = 'PARTIAL' with a PIXEL column first;
    # field 1 is then the second map column (Q_STOKES), both for the header description and for the pixels,
    # so it is refused as temperature
    from twinring.skymap import header_info

    cols = [fits.Column("PIXEL", "J", array=np.arange(10)),
            fits.Column("I_STOKES", "E", array=np.ones(10), unit="uK"),
            fits.Column("Q_STOKES", "E", array=np.ones(10), unit="uK")]
    h = fits.BinTableHDU.from_columns(cols)
    h.header.update(PIXTYPE="HEALPIX", NSIDE=4, ORDERING="RING", OBJECT="PARTIAL", INDXSCHM="IMPLICIT")
    h.writeto(tmp_path / "cut.fits")
    assert header_info(tmp_path / "cut.fits", 0)["column"] == "I_STOKES"
    assert header_info(tmp_path / "cut.fits", 1)["column"] == "Q_STOKES"
    with pytest.raises(InputError, match="Q_STOKES"):
        load_map(tmp_path / "cut.fits", field=1)
