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
