"""Group-invariant skies (pipeline/topology/skies.py) and the sky stage.

The matched-circle checks use their own statistic, written here: rings are
interpolated with healpy.get_interp_val and every twist is tried by np.roll,
S = 2 <T1 T2> / <T1^2 + T2^2> (Cornish, Spergel & Starkman 1998, CQG 15, 2657).
"""
from __future__ import annotations

import time

import healpy as hp
import numpy as np
import pytest
from scipy.special import spherical_jn

from twinring import cosmology, rings
from twinring.config import InputError, config_from_dict
from twinring.topology import manifolds as M
from twinring.topology import skies as S
from twinring.topology.circles import predict_pairs
from twinring.topology.stages import run_sky

# (lengths, angles, observer) per space: small domains with a handful of pairs, radii mostly above 15 deg
CASES = {
    "E1": ([1.3, 1.5, 1.7], None, (0.1, 0.2, 0.3)),
    "E2": ([1.5, 1.7, 0.8], None, (0.3, 0.1, 0.0)),
    "E3": ([1.5, 0.6], None, (0.2, 0.1, 0.0)),
    "E4": ([1.6, 0.5], None, (0.15, 0.1, 0.0)),
    "E5": ([1.6, 0.5], None, (0.1, 0.05, 0.0)),
    "E6": ([0.8, 0.9, 1.0], None, (0.1, 0.2, 0.05)),
    "E7": ([0.8, 1.5, 1.6], None, (0.0, 0.3, 0.0)),
    "E8": ([0.8, 1.5, 1.0], None, (0.0, 0.3, 0.0)),
    "E9": ([0.9, 1.5, 0.8], None, (0.1, 0.3, 0.0)),
    "E10": ([0.9, 1.5, 0.8], None, (0.1, 0.3, 0.0)),
    "E11": ([1.5, 1.6], None, (0.0, 0.0, 0.0)),
    "E12": ([1.5, 0.7], None, (0.2, 0.2, 0.0)),
    "E13": ([0.8, 1.5], None, (0.0, 0.3, 0.0)),
    "E14": ([0.8, 1.5], None, (0.0, 0.3, 0.0)),
    "E15": ([0.9, 0.8], None, (0.1, 0.3, 0.0)),
    "E16": ([0.9], [180.0], (0.2, 0.1, 0.0)),
    "E17": ([0.8], None, (0.0, 0.3, 0.0)),
}


def s_curve(m, row, n=256):
    """S for every twist j * 360/n, with the pair's predicted sense (independent of twinring.statistic)."""
    c1 = rings.lonlat_to_vec(row["lon1_deg"], row["lat1_deg"])
    c2 = rings.lonlat_to_vec(row["lon2_deg"], row["lat2_deg"])
    a = np.radians(row["radius_deg"])
    p1 = rings.ring_points(c1, a, n, other=c2)[0]
    p2 = rings.ring_points(c2, a, n, other=c1)[0]
    t1 = hp.get_interp_val(m, *hp.vec2ang(p1))
    t2 = hp.get_interp_val(m, *hp.vec2ang(p2))
    t1, t2 = t1 - t1.mean(), t2 - t2.mean()
    if row["flip"]:
        rev = t2[(-np.arange(n)) % n]            # rev[k] = T2(-phi_k); roll(rev, j)[k] = T2(j dphi - phi_k)
        shifted = [np.roll(rev, j) for j in range(n)]
    else:
        shifted = [np.roll(t2, -j) for j in range(n)]  # T2(phi_k + j dphi)
    return np.array([2 * np.mean(t1 * u) / np.mean(t1**2 + u**2) for u in shifted])


def best(m, row, n=256):
    c = s_curve(m, row, n)
    j = int(np.argmax(c))
    return float(c[j]), 360.0 * j / n


def twist_error(found, predicted):
    d = abs(found - predicted) % 360.0
    return min(d, 360.0 - d)


# --------------------------------------------------------------------------- invariance
INVARIANCE = [(n, CASES[n][0], CASES[n][1]) for n in CASES] + [("E16", [0.9], [90.0]), ("E16", [0.9], [120.0]),
                                                               ("E16", [0.9], [300.0]), ("E16", [0.9], None)]


@pytest.mark.parametrize("name, lengths, ang", INVARIANCE)
def test_field_is_invariant_under_every_generator(name, lengths, ang):
    # Reference: the definition of a field on the quotient space: f(g x) = f(x) for all g (MATH.md section 5).
    sp = M.build_space(name, lengths, ang, euler_deg=(10.0, 25.0, -40.0))
    modes = S.invariant_modes(sp, 14.0, np.random.default_rng(3), open_length=2.5)
    pts = np.random.default_rng(9).uniform(-1.5, 1.5, (60, 3))
    fc = S.field_at(modes, pts, eps=1e-12, complex_values=True)
    f = fc.real
    scale = np.std(f)
    assert scale > 0
    assert np.max(np.abs(fc.imag)) < 1e-10 * scale          # a real field: C_-k = C_k*
    for label, g in sp.generators:
        assert np.max(np.abs(S.field_at(modes, g(pts), eps=1e-12) - f)) < 1e-8 * scale, label
    # ... and it can fail: a motion that is not in the group breaks the match
    other = M.Isometry(np.eye(3), 0.37 * sp.lattice[:, 0] if sp.lattice.shape[1] else np.array([0.37, 0, 0]))
    assert np.max(np.abs(S.field_at(modes, other(pts), eps=1e-12) - f)) > 1e-3 * scale


def test_half_turn_field_is_not_periodic_in_c():
    # E2: invariant under the screw (half turn + c z), not under the bare translation c z.
    sp = M.build_space("E2", [1.5, 1.7, 0.8])
    modes = S.invariant_modes(sp, 14.0, np.random.default_rng(1))
    pts = np.random.default_rng(2).uniform(-1, 1, (40, 3))
    f = S.field_at(modes, pts, eps=1e-12)
    shifted = S.field_at(modes, pts + [0, 0, 0.8], eps=1e-12)
    assert np.max(np.abs(shifted - f)) > 0.1 * np.std(f)


# --------------------------------------------------------------------------- harmonic paths
def test_sw_map_equals_rayleigh_expansion():
    # The NUFFT evaluation on the sphere must equal the plane-wave expansion
    # e^{ik.x} = 4 pi sum_lm i^l j_l(k r) Y*_lm(k) Y_lm(x) (Rayleigh) done through the full-physics path with
    # Delta_l = -j_l(k chi)/5 (scipy.special.spherical_jn): two independent routes to the same a_lm.
    sp = M.build_space("E1", [2.5, 2.7, 3.0], observer=(0.2, 0.1, -0.3))
    kmax, lmax, chi = 40.0, 16, 13884.0
    modes = S.invariant_modes(sp, kmax, np.random.default_rng(1))
    a_sw = S.sw_alm(modes, sp.observer, lmax, 2.7255e6, kmax)
    q = np.linspace(0.5, kmax + 5, 3000) / chi
    ells = np.arange(2, lmax + 1)
    delta = np.array([-spherical_jn(l, q * chi) / 5 for l in ells])
    tr = cosmology.Transfer(q=q, ells=ells, delta=delta, chi_mpc=chi, a_s=2.1e-9, n_s=1.0, pivot_mpc=0.05,
                            tcmb_uk=2.7255e6)
    a_full = S.full_alm(modes, sp.observer, lmax, tr)
    ell = hp.Alm.getlm(lmax)[0]
    sel = ell >= 2
    assert np.max(np.abs(a_sw[sel] - a_full[sel])) < 1e-6 * np.max(np.abs(a_sw[sel]))


def sw_reference_cl(lmax, kmax=2000.0, dk=0.1):
    """Sachs-Wolfe C_l (uK^2) of the default cosmology: T0^2 (4 pi / 25) int dk/k Delta_R^2(k) j_l(k chi)^2
    (Sachs & Wolfe 1967; Phi = -3 R / 5, dT/T = Phi / 3), by trapezoidal quadrature of scipy.special.spherical_jn
    on k chi in (0, 2000] (step 0.1, about 30 points per period of j_l^2), where the omitted part is about
    l (l + 1) / (2 * 2000^2) < 6e-4 for l <= 64."""
    p = cosmology._params(None)
    k = np.arange(1, int(kmax / dk) + 1) * dk
    pivot = p[9] * cosmology.chi_ls_gpc() * 1000.0
    ref = np.zeros(lmax + 1)
    for ell in range(2, lmax + 1):
        ref[ell] = (p[5] * 1e6) ** 2 * 4 * np.pi / 25 * np.trapezoid(
            p[7] * (k / pivot) ** (p[8] - 1) * spherical_jn(ell, k) ** 2 / k, k)
    return ref


def band_z(cls, ref, width):
    """Band powers of the mean of ``cls`` over bands of ``width`` multipoles from l = 2 (the last band takes
    the remainder): (bands, ratio to ``ref``, z = (ratio - 1) / sigma), with the Gaussian cosmic variance of a
    (2l+1)-weighted band averaged over len(cls) skies: sigma^2 = 2 sum (2l+1) C_l^2 / (sum (2l+1) C_l)^2 / n
    (Knox 1995, PRD 52, 4307, full sky, no noise)."""
    cl = np.mean(cls, axis=0)
    lmax = cl.size - 1
    lo = list(range(2, lmax + 1, width))
    if lmax + 1 - lo[-1] < width // 2 and len(lo) > 1:
        lo.pop()
    bands = [(a, (lo[i + 1] - 1) if i + 1 < len(lo) else lmax) for i, a in enumerate(lo)]
    ratio, z = [], []
    for a, b in bands:
        ell = np.arange(a, b + 1)
        w = 2 * ell + 1
        r = np.sum(w * cl[ell]) / np.sum(w * ref[ell])
        sig = np.sqrt(2 * np.sum(w * ref[ell] ** 2) / len(cls)) / np.sum(w * ref[ell])
        ratio.append(r)
        z.append((r - 1) / sig)
    return bands, np.array(ratio), np.array(z)


def _large_domain_band_check(lmax, nside, n_sw, n_full, width, side=4.0):
    # A torus much larger than the sphere (side >= 4 chi) must give the isotropic C_l within cosmic variance
    # in every band up to lmax: full physics against CAMB's own C_l (isotropic_cl), Sachs-Wolfe against the
    # SW integral above (scipy quadrature).  Band width ``width``, tolerance 3 sigma per band.  Today's cut
    # (kmax = 2 lmax, nothing put back) must fail the same check.
    sp = M.build_space("E1", [side] * 3)
    refs = {"sw": sw_reference_cl(lmax), "full": cosmology.isotropic_cl(lmax)}
    for physics, n in (("sw", n_sw), ("full", n_full)):
        cls = [hp.alm2cl(S.sky_alm(sp, S.SkyRecipe(nside=nside, lmax=lmax, fwhm_deg=0.0, physics=physics, seed=s)))
               for s in range(n)]
        bands, ratio, z = band_z(cls, refs[physics], width)
        assert np.all(np.abs(z) < 3.0), (physics, bands, ratio.round(3), z.round(1))
        old = [hp.alm2cl(S.sky_alm(sp, S.SkyRecipe(nside=nside, lmax=lmax, fwhm_deg=0.0, physics=physics,
                                                  seed=s, kmax_factor=2.0, correct_tail=False)))
               for s in range(n)]
        _, ratio_old, z_old = band_z(old, refs[physics], width)
        assert z_old[-1] < -3.0, (physics, "old cut", ratio_old.round(3), z_old.round(1))


def test_large_domain_band_powers_match_isotropic_spectra():
    # lmax 32, bands of 6 multipoles (2-7, ..., 26-32), 4 SW skies and 2 full-physics skies, 3 sigma per band.
    _large_domain_band_check(lmax=32, nside=32, n_sw=4, n_full=2, width=6)


@pytest.mark.slow
def test_large_domain_band_powers_match_isotropic_spectra_lmax64():
    # The case: E1 of side 4 chi, lmax 64, Nside 64; bands of 8 multipoles, 8 SW and 4 full skies.
    _large_domain_band_check(lmax=64, nside=64, n_sw=8, n_full=4, width=8)


def test_sw_integral_closed_form_matches_quadrature():
    # int_0^inf x^(n-2) j_l(x)^2 dx (Gradshteyn & Ryzhik 6.574.2) against scipy quadrature of spherical_jn, and
    # 1 / (2 l (l + 1)) at n = 1 (from memory: the flat Sachs-Wolfe plateau l (l + 1) C_l = const).
    ells = np.array([2, 5, 17, 40])
    assert np.allclose(S.sw_integral_total(ells, 1.0), 1 / (2 * ells * (ells + 1)), rtol=1e-10)
    x = np.arange(1, 400001) * 0.01
    for n_s in (0.9665, 1.1):
        quad = [np.trapezoid(x ** (n_s - 2) * spherical_jn(ell, x) ** 2, x) for ell in ells]
        assert np.allclose(S.sw_integral_total(ells, n_s), quad, rtol=2e-3)


@pytest.mark.parametrize("physics", ["sw", "full"])
def test_automatic_cut_converges_the_transfer_integral(physics):
    # The automatic cut keeps all but <= tail_tolerance of every C_l (2 <= l <= lmax), and a cut 3 % lower
    # does not (it is the smallest). Kept fractions are recomputed here independently: sw by scipy quadrature
    # of spherical_jn against the closed form; full from CAMB's transfer functions, whose full integral is
    # CAMB's own C_l (isotropic_cl) within 1 %.
    lmax = 48
    cut = S.mode_cut(S.SkyRecipe(lmax=lmax, physics=physics))
    assert cut.automatic and cut.factor >= 1.0
    ells = np.arange(2, lmax + 1)
    p = cosmology._params(None)

    def kept(kmax):
        if physics == "sw":
            x = np.linspace(1e-6, kmax, int(kmax / 0.02))
            part = np.array([np.trapezoid(x ** (p[8] - 2) * spherical_jn(ell, x) ** 2, x) for ell in ells])
            return part / S.sw_integral_total(ells, p[8])
        tr = cosmology.transfer_functions(lmax, S.REF_FACTOR * lmax)
        ref = cosmology.isotropic_cl(lmax)[2:]
        assert np.allclose(tr.cl_from_transfer(), ref, rtol=0.01)
        return tr.cl_from_transfer(qmax=kmax / tr.chi_mpc) / ref

    k_here = kept(cut.kmax)
    assert np.all(1 - k_here <= cut.tolerance + 0.01), (1 - k_here).max()
    assert np.allclose(cut.kept[2:], k_here, atol=0.01)
    assert np.allclose(cut.gain[2:], 1 / np.sqrt(cut.kept[2:]))
    assert np.max(1 - kept(0.97 * cut.kmax)) > cut.tolerance - 0.01
    # an explicit factor is honoured, and its larger omitted part is put back
    c2 = S.mode_cut(S.SkyRecipe(lmax=lmax, physics=physics, kmax_factor=1.5))
    assert c2.kmax == pytest.approx(1.5 * lmax) and not c2.automatic
    assert c2.worst_omitted > cut.worst_omitted
    assert np.allclose(c2.kept[2:], kept(1.5 * lmax), atol=0.01)
    off = S.mode_cut(S.SkyRecipe(lmax=lmax, physics=physics, correct_tail=False))
    assert np.all(off.gain == 1.0)


# --------------------------------------------------------------------------- matched circles in the skies
@pytest.mark.parametrize("name", list(CASES))
def test_sachs_wolfe_sky_shows_every_predicted_pair(name):
    # Noiseless Sachs-Wolfe sky: S >= 0.9 on every predicted pair, at the predicted twist (within 3 degrees).
    # Monopole and dipole kept (lmin 0): removing them on the sphere is not a function of the 3-D field and
    # would unmatch the largest circles.
    lengths, ang, obs = CASES[name]
    sp = M.build_space(name, lengths, ang, obs)
    rows = predict_pairs(sp)
    assert rows
    m = S.make_sky(sp, nside=64, lmax=96, fwhm_deg=3.5, physics="sw", seed=1, lmin=0, kmax_factor=1.2,
                   open_length=2.5)
    for r in rows:
        s, twist = best(m, r)
        assert s >= 0.9, (r["element"], r["radius_deg"], s)
        assert twist_error(twist, r["twist_deg"]) < 3.0, (r["element"], twist, r["twist_deg"])


def test_unrelated_circles_do_not_match():
    # The same statistic on circles that are not a pair stays far below (common practice: S ~ 0 +- 1/sqrt(N)).
    sp = M.build_space("E1", [1.3, 1.5, 1.7], observer=(0.1, 0.2, 0.3))
    m = S.make_sky(sp, nside=64, lmax=96, fwhm_deg=3.5, seed=1, lmin=0, kmax_factor=1.2)
    fake = dict(lon1_deg=10.0, lat1_deg=20.0, lon2_deg=200.0, lat2_deg=-35.0, radius_deg=40.0, flip=True)
    assert best(m, fake)[0] < 0.6


def test_full_physics_lowers_matches_most_at_small_radii():
    # Doppler and integrated Sachs-Wolfe terms differ between the two views of a circle, most for small
    # circles whose two views look along nearly opposite directions (Cornish, Spergel & Starkman 1998;
    # Riazuelo et al. 2004).
    sp = M.build_space("E1", [0.4, 1.85, 3.0])
    rows = predict_pairs(sp)
    r_deg = np.array([r["radius_deg"] for r in rows])
    assert r_deg.max() > 70 and r_deg.min() < 25
    kw = dict(nside=64, lmax=96, fwhm_deg=3.5, seed=7, lmin=2, kmax_factor=1.5)
    m_sw = S.make_sky(sp, physics="sw", **kw)
    m_full = S.make_sky(sp, physics="full", **kw)
    sw = np.array([best(m_sw, r)[0] for r in rows])
    full = np.array([best(m_full, r)[0] for r in rows])
    assert np.all(full < sw)
    big, small = full[r_deg > 60].mean(), full[r_deg < 25].mean()
    assert big > small + 0.1, (big, small)


# --------------------------------------------------------------------------- beam, noise, mask, seeds
def test_beam_noise_and_seeds():
    sp = M.build_space("E1", [1.2, 1.2, 1.2])
    kw = dict(nside=32, lmax=64, physics="sw", kmax_factor=1.2)
    m0, a0 = S.make_sky(sp, fwhm_deg=0.0, seed=5, return_alm=True, **kw)
    m3, a3 = S.make_sky(sp, fwhm_deg=3.0, seed=5, return_alm=True, **kw)
    # beam: healpy's Gaussian window, multipole by multipole
    bl = hp.gauss_beam(np.radians(3.0), lmax=64)
    ell = hp.Alm.getlm(64)[0]
    assert np.allclose(a3, a0 * bl[ell], rtol=1e-12, atol=1e-12 * np.abs(a0).max())
    # same seed, same sky; another seed, another sky
    assert np.array_equal(m0, S.make_sky(sp, fwhm_deg=0.0, seed=5, **kw))
    assert np.corrcoef(m0, S.make_sky(sp, fwhm_deg=0.0, seed=6, **kw))[0, 1] < 0.5
    # white noise: sigma per pixel = depth / pixel side (common practice, no source)
    mn = S.make_sky(sp, fwhm_deg=3.0, seed=5, noise_uk_arcmin=40.0, **kw)
    sigma = 40.0 / (np.sqrt(hp.nside2pixarea(32, degrees=True)) * 60.0)
    assert np.std(mn - m3) == pytest.approx(sigma, rel=0.03)
    # monopole and dipole removed by default
    assert np.allclose(hp.map2alm(m3, lmax=2, iter=3)[[0, 1, 3]], 0, atol=1e-3 * np.std(m3))


def test_demo_mask():
    nside = 64
    m = S.demo_mask(nside, band_deg=12.0, n_holes=30, hole_deg=1.5, rng=np.random.default_rng(2))
    theta, phi = hp.pix2ang(nside, np.arange(m.size))
    lat = 90 - np.degrees(theta)
    assert set(np.unique(m)) <= {0.0, 1.0}
    assert np.all(m[np.abs(lat) < 11.5] == 0)                  # the band
    assert 0.6 < m.mean() < 0.85                               # galactic cuts keep 60-85% (common practice)
    band_only = S.demo_mask(nside, 12.0, 0, 1.5)
    holes = band_only.mean() - m.mean()
    cap = (1 - np.cos(np.radians(1.5))) / 2
    assert 0.3 * 30 * cap < holes < 1.05 * 30 * cap            # about 30 holes, some falling in the band
    assert np.array_equal(S.mask_for_seed(nside, 4), S.mask_for_seed(nside, 4))


# --------------------------------------------------------------------------- the stage
def _cfg(topology, sky=None, **more):
    raw = {"topology": topology, "sky": sky or {}}
    raw.update(more)
    return config_from_dict(raw, source="sky.yaml")


def test_run_sky_acceptance_e2(tmp_path):
    # Acceptance (issue 3): twinring sky for E2 [2.5, 2.5, 1.2] from (0.3, 0, 0) at Nside 64, lmax 128, 3 deg:
    # the predicted pair shows S >= 0.85 under the independent statistic; the SW sky takes well under 20 s.
    from twinring import skymap

    cfg = _cfg({"space": "E2", "lengths": [2.5, 2.5, 1.2], "observer": [0.3, 0, 0]},
               {"nside": 64, "lmax": 128, "fwhm_deg": 3.0, "physics": "sw", "seed": 5, "mask": "demo"})
    t0 = time.perf_counter()
    paths = run_sky(cfg, tmp_path)
    assert time.perf_counter() - t0 < 20.0
    sky = skymap.load_map(paths["sky"], mask_path=paths["mask"])
    assert sky.nside == 64 and sky.unit_in == "uK" and 0.5 < sky.fsky < 0.9
    from astropy.io import fits

    h = fits.getheader(paths["sky"], 1)
    assert h["SPACE"] == "E2" and h["PHYSICS"] == "sw" and h["SEED"] == 5 and h["ORDERING"] == "RING"
    assert h["LENGTHS"] == "[2.5, 2.5, 1.2]" and h["OBSERVER"] == "[0.3, 0.0, 0.0]"
    values = hp.read_map(paths["sky"])
    rows = predict_pairs(M.build_space("E2", [2.5, 2.5, 1.2], observer=(0.3, 0, 0)))
    assert len(rows) == 1
    assert best(values, rows[0])[0] >= 0.85


@pytest.mark.parametrize("name, lengths, obs", [("E1", [1.2, 1.2, 1.2], [0.0, 0.0, 0.0]),
                                                ("E6", [0.7, 0.8, 0.9], [0.1, 0.2, 0.05])])
def test_run_sky_acceptance_e1_e6(tmp_path, name, lengths, obs):
    cfg = _cfg({"space": name, "lengths": lengths, "observer": obs}, {"seed": 5})
    values = hp.read_map(run_sky(cfg, tmp_path)["sky"])
    rows = predict_pairs(M.build_space(name, lengths, observer=obs))
    assert len(rows) >= 9
    assert min(best(values, r)[0] for r in rows) >= 0.85


@pytest.mark.parametrize("topology, sky, more, key", [
    ({"space": "E1", "lengths": [1.2, 1.2, 1.2]}, {"nside": 32, "lmax": 100}, {}, "sky.lmax"),
    ({"space": "E1", "lengths": [3.0, 3.0, 3.0]}, {"kmax_factor": 3.0},
     {"compute": {"memory_gb": 0.05}, "search": {"nside_centers": 2, "radius_deg": [20, 80, 20]}},
     "sky.kmax_factor"),
    ({"space": "E16", "lengths": [1.0], "angles_deg": [72.0]}, {}, {}, "topology.angles_deg"),
    ({"space": "E13", "lengths": [0.8, 1.5], "observer": [0.0, 0.9, 0.0]}, {"open_length_chi": 2.1}, {},
     "sky.open_length_chi"),
    ({"space": "E1", "lengths": [1.2, 1.2, 1.2]}, {"physics": "exact"}, {}, "sky.physics"),
])
def test_bad_sky_parameters_fail_before_work(tmp_path, topology, sky, more, key):
    t0 = time.perf_counter()
    with pytest.raises(InputError) as exc:
        run_sky(_cfg(topology, sky, **more), tmp_path)
    assert str(exc.value).startswith(f"sky.yaml: {key}: found ")
    assert time.perf_counter() - t0 < 3.0
    assert not (tmp_path / "sky.fits").exists()
