"""The S statistic against its definition (Cornish, Spergel & Starkman 1998, CQG 15, 2657)
and the |m|-weighted Fourier form (Cornish, Spergel, Starkman & Komatsu 2004, PRL 92, 201302)."""
import numpy as np
import healpy as hp
import pytest

from twinring.statistic import ring_spectra, scan_pairs, s_curve, m_weights
from twinring import rings


def band_limited_ring(rng, nsamp, mmax):
    a = np.zeros(nsamp // 2 + 1, complex)
    a[1:mmax] = rng.normal(size=mmax - 1) + 1j * rng.normal(size=mmax - 1)
    return np.fft.irfft(a, n=nsamp)


def direct_s(t1, t2, beta_k, flip, weighting):
    """S straight from the definition: 2 <T1 T2'> / <T1^2 + T2'^2> on |m|-filtered rings
    (filter sqrt|m|, as in CSSK 2004's Fourier form), T2' = T2(phi + beta) or T2(beta - phi)."""
    n = t1.size
    w = np.sqrt(m_weights(n, weighting))
    f1 = np.fft.irfft(np.fft.rfft(t1) * w, n=n)
    f2 = np.fft.irfft(np.fft.rfft(t2) * w, n=n)
    idx = (beta_k - np.arange(n)) % n if flip else (np.arange(n) + beta_k) % n
    g = f2[idx]
    return 2 * np.sum(f1 * g) / np.sum(f1**2 + g**2)


@pytest.mark.parametrize("flip", [False, True])
@pytest.mark.parametrize("weighting", ["m", "flat"])
def test_copied_ring_gives_one_at_its_twist(flip, weighting):
    # From the definition (CSS 1998): a perfect match has S = 1 at its twist and sense.
    rng = np.random.default_rng(3)
    n, twist = 144, 37
    t1 = band_limited_ring(rng, n, 50)
    # circle 2 holds circle 1's pattern: T2(phi + twist) = T1(phi), or T2(twist - phi) = T1(phi)
    t2 = np.empty(n)
    phi = np.arange(n)
    t2[((twist - phi) if flip else (phi + twist)) % n] = t1
    spec = ring_spectra(np.stack([t1, t2]), None, weighting)
    s, k = scan_pairs(spec, [0], spec, [1])
    sense = 1 if flip else 0
    assert s[sense, 0] == pytest.approx(1.0, abs=1e-3)
    assert k[sense, 0] == twist
    assert s[1 - sense, 0] < 0.9      # the other sense does not match
    # scaling the map changes nothing
    spec2 = ring_spectra(np.stack([t1 * 7.5, t2 * 7.5]), None, weighting)
    s2, _ = scan_pairs(spec2, [0], spec2, [1])
    assert s2[sense, 0] == pytest.approx(s[sense, 0], abs=1e-6)


@pytest.mark.parametrize("flip", [False, True])
def test_all_twists_match_the_definition(flip):
    rng = np.random.default_rng(5)
    n = 108
    t1, t2 = band_limited_ring(rng, n, 40), band_limited_ring(rng, n, 40)
    curve = s_curve(t1, t2, flip, "m")
    ref = np.array([direct_s(t1, t2, b, flip, "m") for b in range(n)])
    np.testing.assert_allclose(curve, ref, atol=1e-10)
    spec = ring_spectra(np.stack([t1, t2]), None, "m")
    s, k = scan_pairs(spec, [0], spec, [1])
    sense = 1 if flip else 0
    assert s[sense, 0] == pytest.approx(ref.max(), abs=1e-5)
    assert k[sense, 0] == int(np.argmax(ref))


def test_negative_ring_gives_minus_one_and_bounds():
    # CSS 1998: S = -1 for a perfect anti-match; |S| <= 1 always (Cauchy-Schwarz).
    rng = np.random.default_rng(8)
    t1 = band_limited_ring(rng, 128, 45)
    curve = s_curve(t1, -t1, False, "m")
    assert curve[0] == pytest.approx(-1.0, abs=1e-9)
    for _ in range(20):
        a, b = band_limited_ring(rng, 128, 45), band_limited_ring(rng, 128, 45)
        for flip in (False, True):
            c = s_curve(a, b, flip, "flat", oversample=4)
            assert np.all(np.abs(c) <= 1 + 1e-12)


def test_masked_form_equals_plain_form_without_mask_and_tolerates_gaps():
    rng = np.random.default_rng(9)
    n = 144
    t1 = band_limited_ring(rng, n, 50)
    t2 = np.roll(t1, 11)
    vals = np.stack([t1, t2, t1])
    full = ring_spectra(vals, None, "m")
    masked_all_valid = ring_spectra(vals, np.ones_like(vals), "m")
    s_a, k_a = scan_pairs(full, [0, 0], full, [1, 2])
    s_b, k_b = scan_pairs(masked_all_valid, [0, 0], masked_all_valid, [1, 2])
    np.testing.assert_allclose(s_a, s_b, atol=1e-6)
    # a gap of 20% on circle 2: only samples valid on both circles count (MATH.md section 2)
    u = np.ones_like(vals)
    u[1, 30:59] = 0
    sp = ring_spectra(vals, u, "m")
    s, k = scan_pairs(sp, [0], sp, [1])
    assert k[0, 0] == 11 and s[0, 0] > 0.99
    # too few valid samples: the pair is skipped
    u[1, :100] = 0
    sp = ring_spectra(vals, u, "m")
    s, _ = scan_pairs(sp, [0], sp, [1], min_valid_fraction=0.5)
    assert np.all(np.isneginf(s))


def test_gaussian_sky_null_spread():
    """Isotropic Gaussian sky (healpy.synfast with healpy's shipped fiducial spectrum): S over
    random pairs has mean ~ 0 and spread ~ 1/sqrt(N_eff) (common practice, no source).

    N_eff for the |m|-weighted S of two independent rings at a fixed twist:
    S = 2 Re sum_m w_m conj(a1_m) a2_m / D with D ~ 2 sum_m w_m P_m, and Re(conj(a1) a2) has variance
    P_m^2 / 2 for independent complex Gaussian coefficients of power P_m, so
    var(S) = sum_m w_m^2 P_m^2 / (2 (sum_m w_m P_m)^2) = 1 / N_eff,
    N_eff = 2 (sum_m w_m P_m)^2 / sum_m w_m^2 P_m^2 (two real degrees of freedom per m), with P_m the mean
    ring power at m, measured from the rings themselves.
    """
    import os
    # healpy/data/totcls.dat: columns l, TT, EE, BB, TE as l(l+1)C_l/2pi in uK^2
    tab = np.loadtxt(os.path.join(os.path.dirname(hp.__file__), "data", "totcls.dat"))
    ell = tab[:, 0]
    cl = np.where(ell > 1, tab[:, 1] * 2 * np.pi / np.maximum(ell * (ell + 1), 1), 0.0)
    lmax = 96
    np.random.seed(0)  # healpy.synfast draws from numpy's global generator
    m = hp.synfast(cl[: lmax + 1], 64, lmax=lmax, fwhm=np.radians(2.0))
    alm = hp.map2alm(m, lmax=lmax)
    rng = np.random.default_rng(1)
    c = rings.unit(rng.normal(size=(400, 3)))
    alpha = np.radians(50)
    nsamp = rings.samples_for(alpha, lmax)
    vals, _ = rings.sample_rings(alm, lmax, c, alpha, nsamp)
    spec = ring_spectra(vals, None, "m")
    i = np.arange(0, 400, 2)
    j = i + 1
    # S at twist 0 for random pairs
    s0 = []
    for a, b in zip(i, j):
        s0.append(s_curve(vals[a], vals[b], False, "m")[0])
    s0 = np.array(s0)
    w = m_weights(nsamp, "m")
    p = np.mean(np.abs(np.fft.rfft(vals, axis=-1)) ** 2, axis=0)
    n_eff = 2 * np.sum(w * p) ** 2 / np.sum(w**2 * p**2)
    expected = 1 / np.sqrt(n_eff)
    assert abs(s0.mean()) < 3 * expected / np.sqrt(s0.size)
    assert 0.8 * expected < s0.std() < 1.2 * expected
    # the kernel's maxima over twist sit well above zero but below 1
    s, _ = scan_pairs(spec, i, spec, j)
    assert 0.1 < np.median(s) < 0.8


def test_weights_given_per_mode_equal_the_named_weightings():
    # an array of ring weights (the optimal filter's form) reproduces 'm' and 'flat' when it holds |m| or 1,
    # with and without a mask; negative weights are refused
    from twinring.statistic import m_weights

    rng = np.random.default_rng(4)
    t1, t2 = rng.normal(size=(2, 64))
    u = (rng.random(64) > 0.2).astype(float)
    for name, arr in (("m", np.arange(40, dtype=float)), ("flat", np.ones(40))):
        for masks in ((None, None), (u, u[::-1].copy())):
            for flip in (False, True):
                a = s_curve(t1, t2, flip, name, *masks)
                b = s_curve(t1, t2, flip, arr, *masks)
                assert np.allclose(a, b, atol=1e-12)
    with pytest.raises(ValueError):
        m_weights(64, -np.ones(33))
