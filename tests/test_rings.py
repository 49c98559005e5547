"""Ring geometry and exact ring values against astropy and scipy.special."""
import numpy as np
import healpy as hp
import pytest
from astropy.coordinates import SkyCoord, CartesianRepresentation
import astropy.units as u
from scipy.special import sph_harm_y

from twinring import rings


def test_samples_lie_at_the_radius_astropy():
    # every sample lies at the requested angular distance from its centre (astropy separations, 1e-9 rad)
    rng = np.random.default_rng(0)
    centres = rings.unit(rng.normal(size=(30, 3)))
    centres[0] = [0, 0, 1]          # a pole, where the phase reference switches to +x
    for radius_deg in (5.0, 37.5, 90.0):
        pts = rings.ring_points(centres, np.radians(radius_deg), 64)
        c = SkyCoord(CartesianRepresentation(*np.repeat(centres[:, None, :], 64, 1).reshape(-1, 3).T), frame="icrs")
        p = SkyCoord(CartesianRepresentation(*pts.reshape(-1, 3).T), frame="icrs")
        sep = c.separation(p).to_value(u.rad)
        np.testing.assert_allclose(sep, np.radians(radius_deg), atol=1e-9)


def test_frames_share_handedness_and_origin_rules():
    rng = np.random.default_rng(1)
    c = rings.unit(rng.normal(size=(50, 3)))
    e1, e2 = rings.phase_frame(c)
    # right-handed about its own centre: e1 x e2 = c
    np.testing.assert_allclose(np.cross(e1, e2), c, atol=1e-12)
    # back-to-back origin: towards the north pole (e1 has the largest z of any unit tangent vector)
    away = np.abs(c[:, 2]) < np.cos(np.radians(rings.POLE_CAP_DEG))
    assert np.all(e1[away, 2] >= 0)
    north = np.array([0, 0, 1.0]) - c[away, 2:3] * c[away]
    np.testing.assert_allclose(e1[away], north / np.linalg.norm(north, axis=-1, keepdims=True), atol=1e-12)
    # other pairs: the origin points to the other circle's centre
    o = rings.unit(rng.normal(size=(50, 3)))
    e1o, _ = rings.phase_frame(c, o)
    proj = o - np.sum(o * c, -1, keepdims=True) * c
    np.testing.assert_allclose(e1o, proj / np.linalg.norm(proj, axis=-1, keepdims=True), atol=1e-12)
    # phase_of inverts ring_points
    pts = rings.ring_points(c[:3], 0.6, 12, other=o[:3])
    for n in range(3):
        ph = rings.phase_of(pts[n], np.repeat(c[n:n + 1], 12, 0), o[n:n + 1])
        np.testing.assert_allclose(np.angle(np.exp(1j * (ph - 2 * np.pi * np.arange(12) / 12))), 0, atol=1e-12)


def test_translation_pairs_at_twist_zero_with_flip():
    # A translation by d along n maps the circle about n onto the one about -n with reversed sense
    # (Weeks, The Shape of Space): with our origins this is flip = True, twist 0 (DESIGN.md conventions).
    rng = np.random.default_rng(2)
    n = rings.unit(rng.normal(size=3))
    alpha = 0.7
    p = rings.ring_points(n, alpha, 24)[0]
    q = p - 2 * np.cos(alpha) * n
    ph2 = rings.phase_of(q, np.repeat(-n[None], 24, 0), n[None])
    phi = 2 * np.pi * np.arange(24) / 24
    np.testing.assert_allclose(np.angle(np.exp(1j * (ph2 - (0 - phi)))), 0, atol=1e-12)


@pytest.mark.parametrize("ell,m", [(3, 0), (5, 2), (12, 7)])
def test_ring_values_equal_spherical_harmonics(ell, m):
    # a single-mode map: ring values equal the analytic real spherical harmonic (scipy.special)
    lmax = 16
    alm = np.zeros(hp.Alm.getsize(lmax), complex)
    alm[hp.Alm.getidx(lmax, ell, m)] = 1.0 if m == 0 else 0.5 * (1 - 0.3j)
    rng = np.random.default_rng(ell)
    c = rings.unit(rng.normal(size=(4, 3)))
    pts = rings.ring_points(c, np.radians(33.0), 40).reshape(-1, 3)
    vals = rings.synthesize_at(alm, lmax, pts)
    theta = np.arccos(pts[:, 2])
    phi = np.arctan2(pts[:, 1], pts[:, 0])
    y = sph_harm_y(ell, m, theta, phi)
    a = alm[hp.Alm.getidx(lmax, ell, m)]
    ref = (a * y).real if m == 0 else 2 * (a * y).real   # real map: a_lm Y_lm + conj
    np.testing.assert_allclose(vals, ref, atol=1e-6)


def test_ring_length_follows_band_limit():
    # about 2 (lmax sin(alpha) + margin) samples, even, 5-smooth: small circles cost less (MATH.md section 3)
    n_small = rings.samples_for(np.radians(10), 128)
    n_big = rings.samples_for(np.radians(80), 128)
    assert n_small < n_big
    for a in (5, 10, 30, 53, 80, 90):
        n = rings.samples_for(np.radians(a), 128, margin=8)
        assert n % 2 == 0 and n >= 2 * (128 * np.sin(np.radians(a)) + 8)
        f = n
        for p in (2, 3, 5):
            while f % p == 0:
                f //= p
        assert f == 1


def test_antipodes_and_twist_conversion():
    ai = rings.antipode_index(8)
    v = rings.center_grid(8)
    np.testing.assert_allclose(v[ai], -v, atol=1e-12)
    # the twist measured in reference frames, converted, agrees with direct phases in pair frames
    rng = np.random.default_rng(4)
    c1, c2 = rings.unit(rng.normal(size=(2, 3)))
    alpha, beta_ref, nsamp = 0.5, 1.1, 90
    phi = 2 * np.pi * np.arange(nsamp) / nsamp
    for flip in (False, True):
        ph2 = beta_ref - phi if flip else beta_ref + phi
        e1, e2 = rings.phase_frame(c2[None])
        p2 = np.cos(alpha) * c2 + np.sin(alpha) * (np.cos(ph2)[:, None] * e1 + np.sin(ph2)[:, None] * e2)
        p1 = rings.ring_points(c1, alpha, nsamp)[0]
        q1 = rings.phase_of(p1, np.repeat(c1[None], nsamp, 0), c2[None])
        q2 = rings.phase_of(p2, np.repeat(c2[None], nsamp, 0), c1[None])
        tw = rings.twist_from_reference(beta_ref, c1, c2, flip)
        pred = (tw - q1) if flip else (tw + q1)
        np.testing.assert_allclose(np.angle(np.exp(1j * (pred - q2))), 0, atol=1e-10)


def test_cached_ring_geometry_equals_direct_points():
    # iso-latitude reuse: the samples of every reference-frame circle, from one circle per HEALPix ring turned
    # by the centre's longitude, are the directly computed points (astropy's unit-sphere conversion, 1e-12)
    rings.clear_geometry_cache()
    c = rings.center_grid(8)                      # 31 iso-latitude rings, the polar caps included
    rep, group, _ = rings._centre_groups(c)
    assert len(set(np.round(c[:, 2], 12))) <= rep.size < c.shape[0]
    for radius_deg in (3.0, 41.0, 90.0):
        a = np.radians(radius_deg)
        n = rings.samples_for(a, 64)
        loc = rings.ring_locations(c, a, n)
        sc = SkyCoord(ra=loc[..., 1].ravel() * u.rad, dec=(np.pi / 2 - loc[..., 0].ravel()) * u.rad, frame="icrs")
        got = sc.cartesian.xyz.value.T.reshape(-1, n, 3)
        np.testing.assert_allclose(got, rings.ring_points(c, a, n), rtol=0, atol=1e-12)
        assert np.all((loc[..., 1] >= 0) & (loc[..., 1] < 2 * np.pi))


def test_cached_rings_equal_uncached():
    # ring values and mask weights through the cache equal those at the directly computed points: the
    # weights exactly, the values to 1e-10 of their rms at ducc0 accuracy 1e-12 (at the default 1e-7 the
    # synthesis itself differs by up to ~1e-7 between coordinates that differ in the last bits)
    rings.clear_geometry_cache()
    lmax = 48
    rng = np.random.default_rng(4)
    alm = hp.synalm(1.0 / np.arange(1, lmax + 2) ** 2, lmax=lmax, new=True)
    c = rings.center_grid(4)
    mask = np.ones(hp.nside2npix(16))
    mask[hp.query_disc(16, rings.unit(rng.normal(size=3)), np.radians(30.0))] = 0.0
    for radius_deg in (7.0, 55.0):
        a = np.radians(radius_deg)
        n = rings.samples_for(a, lmax)
        direct = rings.ring_points(c, a, n)
        w_ref = rings.mask_at(mask, direct)
        for _ in range(2):                         # first call fills the cache, the second reads it
            w = rings.ring_mask_weights(mask, c, a, n)
            assert np.array_equal(w, w_ref) and w.dtype == w_ref.dtype
            v_direct = rings.synthesize_at(alm, lmax, direct, epsilon=1e-12)
            v_cached = rings.synthesize_loc(alm, lmax, rings.ring_locations(c, a, n), epsilon=1e-12)
            np.testing.assert_allclose(v_cached, v_direct, rtol=0, atol=1e-10 * v_direct.std())
        vals, wts = rings.sample_rings(alm, lmax, c, a, n, mask=mask)
        vals0, wts0 = rings.sample_rings(alm, lmax, c, a, n, mask=mask, cache=False)
        assert np.array_equal(wts, wts0)
        np.testing.assert_allclose(vals, vals0, rtol=0, atol=1e-6 * vals0.std())
        # the iso-latitude ring synthesis (exact, no interpolation) gives the same rings
        iso = rings.iso_latitude_plan(c, a, n)
        assert iso is not None
        np.testing.assert_allclose(rings.synthesize_iso(alm, lmax, iso), v_direct, rtol=0, atol=1e-10 * v_direct.std())
    # centres of unequal longitude spacing within a latitude have no iso-latitude plan
    odd = c[[0, 1, 3]] if abs(c[0, 2] - c[3, 2]) < 1e-15 else c[np.flatnonzero(np.abs(c[:, 2] - c[20, 2]) < 1e-15)[[0, 1, 3]]]
    assert rings.iso_latitude_plan(odd, np.radians(20.0), 32) is None
    # the cost rule picks the ring synthesis for many points per ring and low lmax only
    p64 = rings.iso_latitude_plan(rings.center_grid(64), np.radians(50.0), 216)
    assert rings.iso_wins(128, p64) and not rings.iso_wins(383, p64)
