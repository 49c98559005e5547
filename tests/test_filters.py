"""The matched / unmatched split of the temperature and the multipole filter (twinring.filters)."""
import math

import numpy as np
import pytest

camb = pytest.importorskip("camb")

from twinring import filters as F
from twinring.config import PrepareSection

LMAX = 24


@pytest.fixture(scope="module")
def split():
    return F.source_split(LMAX, q_stride=2)


def test_los_integral_reproduces_camb_transfer():
    # reference: CAMB itself (its delta_p_l_k against our line-of-sight integral of its T_source)
    total, los = F.los_check(12, q_stride=4)
    big = np.abs(total) > 0.1 * np.abs(total).max(axis=1, keepdims=True)
    assert np.max(np.abs(los[big] / total[big] - 1)) < 5e-3


def test_parts_add_back_to_camb_total_tt(split):
    # reference: CAMB's own unlensed TT (get_unlensed_scalar_cls), within 1 %
    ell = np.arange(2, LMAX + 1)
    parts = (split.match + split.doppler + split.isw
             + 2 * (split.match_doppler + split.match_isw + split.doppler_isw))
    assert np.allclose(parts[ell], split.total[ell], rtol=1e-10)
    assert np.max(np.abs(split.total[ell] / split.camb_total[ell] - 1)) < 0.01
    # the unmatched parts are real and of the expected kind: ISW largest at the quadrupole, Doppler grows with l
    assert split.isw[2] / split.total[2] > 0.1
    assert split.doppler[LMAX] / split.total[LMAX] > split.doppler[3] / split.total[3]


def test_match_part_is_the_sachs_wolfe_plateau(split):
    # Sachs & Wolfe (1967): l(l+1) C_l / 2 pi = T0^2 A_s / 25 on large scales for n_s = 1 (Phi = -3R/5, dT/T = Phi/3);
    # with n_s = 0.9665 the plateau tilts by l^(n_s - 1) (a few % over l = 2..10); recombination in a
    # universe with radiation left and the early ISW just after it lift it above the pure matter-era value
    ell = np.arange(2, 11)
    d = ell * (ell + 1) * split.match[ell] / (2 * np.pi)
    plateau = (2.7255e6) ** 2 * 2.105e-9 / 25
    assert np.max(d) / np.min(d) < 1.25                 # flat to 25 % over l = 2..10 (total: ISW makes it 1.5)
    assert 0.9 < np.mean(d) / plateau < 1.4
    tot = ell * (ell + 1) * split.total[ell] / (2 * np.pi)
    assert tot[0] / tot[-1] > np.max(d) / np.min(d)     # the ISW makes the total less flat than the match part


def test_view_angle_geometry():
    # two lines of sight to a point of a circle of radius alpha meet at 180 - 2 alpha (MATH.md / issue 10)
    for a in (10.0, 32.0, 53.0, 80.0):
        assert F.view_angle_cos(a) == pytest.approx(math.cos(math.radians(180 - 2 * a)))
    # Doppler coefficient: +1 at 90 deg, 0 at 45 deg; unmatched loss grows as the circle shrinks
    _, rd, ri = F.pair_coefficients(10, 45.0)
    assert abs(rd[3]) < 1e-12 and ri[0] == pytest.approx(1.0)


def test_unmatched_part_decorrelates_as_circle_shrinks(split):
    loss = [np.sum(F.unmatched_fraction(split, a)[2:] * split.total[2:]) for a in (80.0, 60.0, 40.0, 20.0)]
    assert loss[0] > 0 and loss[-1] > loss[0]
    # the Doppler part, which dominates the unmatched power at l > 10, decorrelates monotonically
    rd = [F.pair_coefficients(4, a)[1][2] for a in (80.0, 60.0, 40.0, 20.0)]
    assert all(b < a for a, b in zip(rd, rd[1:]))


def test_filter_is_the_matched_filter_formula(split):
    # written independently: f_l^2 proportional to the mean over radii of b_l^2 C^pair_l / (b_l^2 C_l)^2,
    # C^pair = C^match + rho_D C^D + P_l(c) C^ISW + crosses with the mean coefficient, c = -cos 2 alpha
    from scipy.special import eval_legendre
    import healpy as hp

    bl = hp.gauss_beam(math.radians(2.0), lmax=LMAX)
    ell = np.arange(LMAX + 1)
    acc = np.zeros(LMAX + 1)
    for a in F.REF_RADII_DEG:
        c = -math.cos(math.radians(2 * a))
        pl = eval_legendre(ell, c)
        pair = (split.match + c * split.doppler + pl * split.isw + split.match_doppler * (1 + c)
                + split.match_isw * (1 + pl) + split.doppler_isw * (c + pl))
        x = np.where(ell >= 2, np.maximum(bl ** 2 * pair, 0) / np.where(ell >= 2, bl ** 2 * split.total, 1) ** 2, 0)
        acc += x / x.max()
    want = np.sqrt(acc / acc.max())
    got = F.optimal_filter(split, bl=bl, lmin=2)
    assert np.allclose(got, want, rtol=1e-10, atol=1e-12)


def test_prepare_section_takes_the_filter_key():
    from twinring.config import InputError, config_from_dict

    assert PrepareSection().filter == "none"
    with pytest.raises(InputError):
        config_from_dict({"prepare": {"filter": "wiener"}})
    assert config_from_dict({"prepare": {"filter": "optimal"}}).prepare.filter == "optimal"


# --------------------------------------------------------------------------- the optimal filter (ring modes, per radius)
def test_optimal_ring_weights_are_the_matched_weights(split):
    # written independently: W_m proportional to max(P^pair_m, 0) / (P^tot_m + floor)^2 with
    # P_m = sum_l C_l |Y_lm(alpha, 0)|^2 (scipy's sph_harm_y), zero at m = 0
    from scipy.special import sph_harm_y
    import healpy as hp

    bl = hp.gauss_beam(math.radians(3.0), lmax=LMAX)
    alpha = 62.0
    lam = np.zeros((LMAX + 1, LMAX + 1))
    for ell in range(LMAX + 1):
        for m in range(ell + 1):
            lam[ell, m] = abs(sph_harm_y(ell, m, math.radians(alpha), 0.0)) ** 2
    pp = (bl ** 2 * F.pair_spectrum(split, alpha)) @ lam
    pt = (bl ** 2 * split.total) @ lam
    pt = pt + F.RING_FLOOR * pt[1:].max()
    want = np.concatenate([[0.0], np.maximum(pp[1:], 0) / pt[1:] ** 2])
    got = F.optimal_ring_weights(split, alpha, bl)
    assert np.allclose(got, want / want.max(), rtol=1e-9, atol=1e-14)
    assert got[0] == 0 and got.max() == pytest.approx(1.0)


def test_optimal_ring_weights_maximise_the_model_margin(split):
    # Cauchy-Schwarz: over independent ring modes, mean over null spread is largest for W_m proportional
    # to P^pair_m / (P^tot_m)^2 (matched filter; common practice, no source).  Without the floor the
    # optimal weights beat |m|, flat and random positive weightings at every radius.
    rng = np.random.default_rng(3)
    for alpha in (30.0, 45.0, 60.0, 75.0):
        w = F.optimal_ring_weights(split, alpha, floor=0.0)
        best = F.margin(split, alpha, weighting=w)
        for other in ["m", "flat"] + [rng.uniform(0, 1, LMAX + 1) for _ in range(5)]:
            assert best >= F.margin(split, alpha, weighting=other) - 1e-9
    # the Doppler part anticorrelates on small circles: their high modes lose weight against large circles
    # (each mode counts by W_m P^tot_m = rho_m, its correlation between the two views)
    x30, x75 = ((lambda pp, pt: F.optimal_ring_weights(split, a, floor=0.0) * pt)(*F.ring_mode_spectra(split, a))
                for a in (30.0, 75.0))
    hi = slice(LMAX // 2, LMAX + 1)
    assert np.sum(x30[hi]) / np.sum(x30) < np.sum(x75[hi]) / np.sum(x75)


def test_weight_table_interpolates_in_radius(split):
    tab = F.ring_weight_table(split, step=5.0)
    assert tab.shape == (18, LMAX + 1)
    w = F.weights_at(tab, 62.5, 64, step=5.0)
    assert w.shape == (33,)
    assert np.allclose(w[: LMAX + 1], 0.5 * (tab[11] + tab[12]))   # rows are 5, 10, ... 90 deg
    assert np.all(w[LMAX + 1:] == 0)
    assert np.allclose(F.weights_at(tab, 60.0, 64, step=5.0)[: LMAX + 1], F.optimal_ring_weights(split, 60.0))


def test_filter_ids():
    from types import SimpleNamespace

    assert F.filter_id(PrepareSection()) == "none"
    tab = np.linspace(0, 1, 12).reshape(3, 4)
    fid = F.filter_id(SimpleNamespace(filter="optimal"), tab)
    assert fid.startswith("optimal:") and fid == F.filter_id(SimpleNamespace(filter="optimal"), tab.copy())
    assert fid != F.filter_id(SimpleNamespace(filter="optimal"), tab * 2)


def test_expected_s_matches_sachs_wolfe_skies_with_noise():
    # Cornish, Spergel & Starkman (1998): on a Sachs-Wolfe sky the two views of a matched circle are
    # identical, so S falls below 1 only through what differs, here white noise.  The model's expected S
    # (SourceSplit with everything matched; the sky's own C_l) must equal the measured mean S of true
    # pairs within its scatter, for both ring weightings and the optimal filter's weights.
    import healpy as hp
    from twinring import rings
    from twinring.statistic import s_curve
    from twinring.topology import manifolds as M
    from twinring.topology import skies as S
    from twinring.topology.circles import predict_pairs

    lmax, fwhm = 40, 6.0
    sp = M.build_space("E1", [0.9, 0.9, 0.9], observer=(0.13, 0.07, 0.21))
    rows = [r for r in predict_pairs(sp) if 45 < r["radius_deg"] < 80]
    bl = hp.gauss_beam(math.radians(fwhm), lmax=lmax)
    cls, got = [], {}
    for seed in (1, 2):
        _, alm = S.make_sky(sp, nside=32, lmax=lmax, fwhm_deg=0.0, physics="sw", seed=seed, return_alm=True)
        cls.append(hp.alm2cl(alm))
    cl = np.mean(cls, axis=0)
    nl = np.full(lmax + 1, 0.3 * np.sum(bl ** 2 * cl * (2 * np.arange(lmax + 1) + 1)) / (4 * np.pi) * 4 * np.pi / 1500)
    zero = np.zeros(lmax + 1)
    model = F.SourceSplit(lmax=lmax, total=cl, match=cl, doppler=zero, isw=zero, match_doppler=zero, match_isw=zero,
                          doppler_isw=zero, camb_total=cl)
    for seed in (1, 2):
        _, alm = S.make_sky(sp, nside=32, lmax=lmax, fwhm_deg=0.0, physics="sw", seed=seed, return_alm=True)
        np.random.seed(100 + seed)                     # healpy's synalm draws from numpy's global generator
        a = hp.almxfl(alm, bl) + hp.synalm(nl, lmax=lmax)
        for row in rows:
            c1 = rings.lonlat_to_vec(row["lon1_deg"], row["lat1_deg"])
            c2 = rings.lonlat_to_vec(row["lon2_deg"], row["lat2_deg"])
            al = math.radians(row["radius_deg"])
            t1, _ = rings.sample_rings(a, lmax, c1, al, 128, other=c2)
            t2, _ = rings.sample_rings(a, lmax, c2, al, 128, other=c1)
            for name in ("m", "flat", "optimal"):
                w = (F.optimal_ring_weights(model, row["radius_deg"], bl, nl, fwhm_deg=fwhm) if name == "optimal"
                     else name)
                s = float(np.max(s_curve(t1[0], t2[0], bool(row["flip"]), weighting=w)))
                got.setdefault(name, []).append((s, row["radius_deg"], w))
    for name, vals in got.items():
        s = np.array([v[0] for v in vals])
        want = np.mean([F.expected_s(model, r, None, bl, nl, w, fwhm_deg=fwhm)[0] for _, r, w in vals])
        no_beam = np.mean([F.expected_s(model, r, None, bl, nl, w)[0] for _, r, w in vals])
        # the beam's different neighbours on the two spheres (beam_coherence) account for part of the loss
        assert abs(s.mean() - want) < abs(s.mean() - no_beam), (name, s.mean(), want, no_beam)
        assert 0.5 < want < 0.95                       # noise matters: the check is not the trivial S = 1
        assert abs(s.mean() - want) < 3 * s.std(ddof=1) / math.sqrt(s.size), (name, s.mean(), want)


def test_the_same_filter_is_in_data_simulation_and_injection_tables(tmp_path):
    # provenance (issue 10): one filter, named by its hash, in every table that depends on it
    import yaml
    from astropy.table import Table
    from twinring.cli import main

    cfg = {
        "topology": {"space": "E1", "lengths": [1.2, 1.2, 1.2]},
        "sky": {"nside": 16, "lmax": 24, "fwhm_deg": 6.0, "seed": 3, "noise_uk_arcmin": 50.0},
        "prepare": {"nside": 16, "lmax": 24, "fwhm_deg": 8.0, "input_fwhm_deg": 6.0, "filter": "optimal"},
        "search": {"nside_centers": 4, "radius_deg": [30, 80, 25], "top": 3},
        "calibrate": {"simulations": 19, "spectrum": "theory", "noise_uk_arcmin": 50.0},
        "inject": {"radii_deg": [60.0], "realizations": 1, "physics": "sw"},
        "bound": {},
        "output": {"dir": str(tmp_path / "out")},
        "compute": {"progress": False},
    }
    (tmp_path / "c.yaml").write_text(yaml.safe_dump(cfg))
    assert main(["run", str(tmp_path / "c.yaml")]) == 0
    out = tmp_path / "out"
    cand = Table.read(out / "candidates.ecsv")
    fid = cand.meta["filter"]
    assert fid.startswith("optimal:") and len(fid) == len("optimal:") + 12
    assert cand.meta["weighting"] == "optimal"
    assert Table.read(out / "thresholds.ecsv").meta["filter"] == fid
    assert Table.read(out / "injections.ecsv").meta["filter"] == fid
    # the report shows the model's expected S beside the injections' measured mean S (issue 10, item 3)
    rec = Table.read(out / "recovery.ecsv")
    inj = Table.read(out / "injections.ecsv")
    assert rec["s_mean"][0] == pytest.approx(np.mean(inj["s"][np.isfinite(inj["s"])]))
    assert 0.3 < rec["s_expected"][0] <= 1.0
    assert "expected S, model" in (out / "summary.md").read_text()
    # the hash is the filter the search used: recomputed from the config it matches
    from twinring.config import load_config
    from twinring.filters import filter_id, run_filter

    c = load_config(out / "config.yaml")
    assert filter_id(c.prepare, run_filter(c)) == fid


def test_offset_coherence_is_the_mean_legendre_correlation():
    # the mean of P_l(cos theta) (scipy) over a 2-d Gaussian displacement of rms 2 deg, by quadrature
    # over the Rayleigh distribution, against exp(-l(l+1) theta_rms^2 / 4)
    from scipy.special import eval_legendre

    rms = math.radians(2.0)
    s = rms / math.sqrt(2)
    th = np.linspace(0, 8 * s, 4001)
    pdf = th / s ** 2 * np.exp(-th ** 2 / (2 * s ** 2))
    for ell in (2, 10, 30, 60, 90):
        want = np.trapezoid(pdf * eval_legendre(ell, np.cos(th)), th)
        assert F.offset_coherence(ell, 2.0)[ell] == pytest.approx(want, abs=0.01)


def test_grid_offset_and_weights_follow_the_search_grid(split):
    from twinring.config import SearchSection

    coarse = SearchSection(nside_centers=8, radius_deg=(20.0, 80.0, 4.0))
    fine = SearchSection(nside_centers=64, radius_deg=(20.0, 80.0, 0.5))
    # centre spacing of HEALPix nside 8: sqrt(4 pi / 768) rad = 7.329 deg (healpy nside2resol)
    assert F.grid_offset_deg(coarse) == pytest.approx(math.sqrt((4.0 ** 2 + 7.329 ** 2) / 3), rel=1e-3)
    assert F.grid_offset_deg(fine) < F.grid_offset_deg(coarse)
    # a coarser grid moves weight (as rho_m = W_m P_m) to the low modes
    pt = F.ring_mode_spectra(split, 60.0)[1]
    lo, hi = (F.optimal_ring_weights(split, 60.0, offset_deg=o, floor=0.0) * pt for o in (0.0, 6.0))
    k = np.arange(LMAX + 1)
    assert np.sum(k * hi) / np.sum(hi) < np.sum(k * lo) / np.sum(lo)


def test_beam_coherence_limits():
    # no beam, or circles of 90 deg (the two spheres touch: theta = 0), leave the views identical;
    # the loss grows with m, with the beam and as the circle shrinks
    assert np.allclose(F.beam_coherence(40, 50.0, 0.0), 1.0)
    assert np.allclose(F.beam_coherence(40, 90.0, 3.0), 1.0, atol=1e-9)
    r = F.beam_coherence(80, 50.0, 3.0)
    assert np.all(np.diff(r[1:]) < 0) and 0.3 < r[80] < 0.9
    assert F.beam_coherence(80, 50.0, 5.0)[60] < r[60] < F.beam_coherence(80, 70.0, 3.0)[60]


def test_source_split_disk_cache(tmp_path, monkeypatch):
    # the split is kept as plain arrays (npz, no pickle) and read back identically; a damaged file is
    # recomputed and replaced
    monkeypatch.setenv("TWINRING_CACHE", str(tmp_path))
    F._source_split.cache_clear()
    a = F.source_split(8, q_stride=4)
    files = list(tmp_path.glob("split-*.npz"))
    assert len(files) == 1
    F._source_split.cache_clear()
    b = F.source_split(8, q_stride=4)
    for f in F.SPLIT_FIELDS:
        assert np.array_equal(getattr(a, f), getattr(b, f))
    files[0].write_bytes(b"not an npz")
    F._source_split.cache_clear()
    c = F.source_split(8, q_stride=4)
    assert np.allclose(c.total, a.total) and files[0].stat().st_size > 100
    F._source_split.cache_clear()


@pytest.mark.slow
def test_optimal_filter_ties_m_and_beats_flat_weighting_on_full_physics_tori():
    # The campaign test, small: full-physics E1 cubic tori with the demo survey's beam, noise and mask
    # (scripts/benchmark_filters.py, 8 skies per radius at 60-75 deg, 20 simulations: the fewest that resolve
    # a 5 % rate), the optimal filter, |m| and flat weighting on the same skies and simulations.  Paired margin
    # difference = S difference on the same sky minus the difference of the simulations' largest S at that
    # radius.  What the wide campaign (README, 29 skies, 40 simulations) measured and this checks:
    # * against flat weighting the matched weights gain at every radius (+0.08 to +0.20 there): more ring
    #   modes share the weight, so the null's largest S falls far more than a true pair's S (Cauchy-Schwarz
    #   for independent ring modes); required here: above 0 at every radius and, averaged over the radii,
    #   above 3 standard errors (with 8 skies flat weighting's S scatters by 0.03 per radius: at 60 deg
    #   +0.031 +- 0.028 was measured);
    # * against |m| they tie (-0.013 +- 0.005 to +0.020 +- 0.004 there): |m| already whitens the ring
    #   modes of a Sachs-Wolfe-like spectrum; required here: within 0.04 + 3 standard errors.
    # The issue asked for "at least |m| at every radius": measured, that does not hold at 60-65 deg.
    # About 11 minutes.
    import subprocess
    import sys
    from pathlib import Path

    script = Path(__file__).resolve().parents[1] / "scripts" / "benchmark_filters.py"
    p = subprocess.run([sys.executable, str(script), "8", "20", "optimal,none,flat", "--radii",
                        "60,62.5,65,67.5,70,72.5,75"], capture_output=True, text=True, timeout=3600)
    assert p.returncode == 0, p.stderr[-2000:]
    rows = {}
    for ln in p.stdout.splitlines():
        parts = ln.split()
        if parts and parts[0] in ("none", "flat") and parts[-1].count("+-") == 1:
            margin, se = (float(x) for x in parts[-1].split("+-"))
            assert math.isfinite(margin) and math.isfinite(se), ln
            rows.setdefault(parts[0], []).append((margin, se))
    assert len(rows.get("none", [])) == 7 and len(rows.get("flat", [])) == 7, p.stdout
    flat = np.array(rows["flat"])
    assert np.all(flat[:, 0] > 0), p.stdout
    assert flat[:, 0].mean() > 3 * math.sqrt(np.sum(flat[:, 1] ** 2)) / len(flat), p.stdout
    for margin, se in rows["none"]:
        assert abs(margin) <= 0.04 + 3 * se, p.stdout
    assert p.stdout.strip().splitlines()[-1].startswith("alpha_min optimal=")
