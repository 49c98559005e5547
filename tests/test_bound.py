"""The bound on the size of space from the smallest detectable radius."""
from __future__ import annotations

import math

import numpy as np
import pytest
from astropy.table import Table

from twinring import bound
from twinring.topology.manifolds import build_space
from twinring.topology.circles import predict_pairs


def test_cubic_torus_bound_from_alpha_min_25_deg():
    # Cornish, Spergel & Starkman 1998 geometry: a face pair of a cubic torus has cos(alpha) = L / (2 chi), so
    # no circles above 25 deg means L > 2 chi cos 25 deg = 25.2 Gpc for chi = 13.9 Gpc
    # (compare: Cornish et al. 2004, PRL 92, 201302, quote 24 Gpc from radii above 25 deg)
    assert bound.size_bound(25.0, d1=1.0, chi=13.9) == pytest.approx(25.2, abs=0.05)
    n = np.full(6, 100)
    det = np.array([20, 80, 99, 100, 100, 100])
    rec = Table({"radius_deg": [15.0, 20.0, 25.0, 30.0, 40.0, 60.0], "n": n, "detected": det, "fraction": det / n})
    row = bound.bound_row(rec, 0.95, 0.01, [], 2.0, 1.0, 13.9, "cubic three-torus (E1)", n_sims=200)
    assert row["alpha_min_deg"] == 25.0
    assert row["size_gpc"] == pytest.approx(25.2, abs=0.05)
    assert row["size_gpc"] > 24.0
    text = bound.statement(row)
    assert "25.0 deg" in text and "25.2 Gpc" in text and "cubic three-torus" in text


def test_distance_per_size_matches_the_predicted_circles():
    # the bound's size relation against the predicted circles of the same space: at size 2 cos(alpha) / d1
    # the largest back-to-back circles have radius alpha (E2 half-turn space, shape 1 : 1.2 : 0.8)
    from twinring import inject
    from twinring.config import config_from_dict

    cfg = config_from_dict({"topology": {"space": "E2", "lengths": [1.0, 1.2, 0.8]}})
    shape = inject.shape_from_config(cfg)
    d1 = inject.distance_per_size(shape, cfg.search)
    size = bound.size_bound(35.0, d1)
    radius, pairs = inject.targets(shape.at(size), cfg.search)
    assert radius == pytest.approx(35.0, abs=1e-6)
    assert all(p["separation_deg"] > 179.5 for p in pairs)


def test_alpha_min_rules():
    r = [20, 30, 40, 50, 60, 70]
    f = [0.1, 0.97, 0.9, 1.0, 1.0, 1.0]
    assert bound.alpha_min(r, f, 0.95) == 50          # 40 deg fails, so only 50 deg and above count
    assert bound.alpha_min(r, f, 0.85) == 30
    # a significant candidate at 55 deg: circles were found there, nothing above 55 + tol is excluded below it
    assert bound.alpha_min(r, f, 0.95, significant_radii=[55.0], radius_tol=2.0) == 60
    assert bound.alpha_min(r, f, 0.95, significant_radii=[65.0], radius_tol=2.0) == 70
    assert math.isnan(bound.alpha_min(r, f, 0.95, significant_radii=[75.0], radius_tol=10.0))
    assert math.isnan(bound.alpha_min(r, [1, 1, 1, 1, 1, 0.5], 0.95))
    # order of the table does not matter
    assert bound.alpha_min(r[::-1], f[::-1], 0.95) == 50


def test_significant_rows_read_p_global_only_when_resolved():
    # a Monte Carlo p of 1/(N+1) cannot support a level below it (Davison & Hinkley 1997, ch. 4)
    t = Table({"radius_deg": [30.0, 45.0, 60.0], "flip": [True, True, False], "s_grid": [0.3, 0.8, 0.2],
               "p_global": [0.5, 0.004, np.nan]})
    assert [r[0] for r in bound.significant_rows([t, None], 0.01, 249)] == [45.0]
    assert bound.significant_rows([t], 0.01, 40) == []           # 40 simulations cannot resolve 1 %


def test_detection_headline_names_the_circles():
    n = np.full(3, 100)
    rec = Table({"radius_deg": [30.0, 50.0, 70.0], "n": n, "detected": n, "fraction": np.ones(3)})
    sig = [(45.0, True, 0.004, 0.81)]
    row = bound.bound_row(rec, 0.95, 0.01, sig, 2.0, 1.0, 13.9, "x", n_sims=249)
    assert math.isnan(row["alpha_min_deg"])
    text = bound.statement(row)
    assert text.startswith("Matched circles detected") and "45.0 deg" in text and "249 simulations" in text


def test_no_bound_statement():
    n = np.array([100, 100])
    rec = Table({"radius_deg": [30.0, 40.0], "n": n, "detected": [50, 60], "fraction": [0.5, 0.6]})
    row = bound.bound_row(rec, 0.95, 0.01, [], 2.0, 1.0, 13.9, "cubic three-torus (E1)")
    assert math.isnan(row["size_chi"])
    assert "No bound" in bound.statement(row)
    t = bound.bound_table(row)
    assert t["statement"][0].startswith("No bound")


def test_torus_face_distance_is_the_side():
    # cubic torus: the three face pairs have |g x0 - x0| = L, the six edge pairs L sqrt 2 (CSS 1998)
    pairs = predict_pairs(build_space("E1", (0.9, 0.9, 0.9)), max_distance=2.0 - 1e-9)
    d = sorted({round(p["distance"], 9) for p in pairs})
    assert d[0] == pytest.approx(0.9) and d[1] == pytest.approx(0.9 * math.sqrt(2))


def test_bound_needs_the_lower_limit_by_default():
    # Clopper & Pearson 1934 (Biometrika 26, 404): the one-sided 95 % lower limit of n of n is 0.05^(1/n):
    # 3 of 3 gives 0.37, 59 of 59 gives 0.9505 (scipy.stats.beta)
    n = np.array([3, 59, 59])
    rec = Table({"radius_deg": [30.0, 50.0, 70.0], "n": n, "detected": n, "fraction": np.ones(3)})
    strict = bound.bound_row(rec, 0.95, 0.01, [], 2.0, 1.0, 13.9, "x")
    plain = bound.bound_row(rec, 0.95, 0.01, [], 2.0, 1.0, 13.9, "x", point_fraction=True)
    assert strict["alpha_min_deg"] == 50.0 and plain["alpha_min_deg"] == 30.0
    assert "lower limit" in bound.statement(strict) and "point fraction" in bound.statement(plain)
    # a campaign of 3 realisations per radius gives no alpha_min and says how many are needed
    small = Table({"radius_deg": [30.0, 50.0], "n": [3, 3], "detected": [3, 3], "fraction": [1.0, 1.0]})
    row = bound.bound_row(small, 0.95, 0.01, [], 2.0, 1.0, 13.9, "x")
    assert math.isnan(row["alpha_min_deg"])
    assert "59 of 59" in bound.statement(row)


def test_spherical_bound_from_alpha_min():
    # Cornish, Spergel & Starkman 1998: in a spherical space an image at distance d (in curvature radii R)
    # makes circles with cos(alpha) = tan(d/2) / tan(chi/R). For the Poincare dodecahedral space I* the
    # nearest images lie at pi/5 (Luminet et al. 2003, from memory); no circles above alpha_min = 10 deg
    # excludes every chi/R above arctan(tan(pi/10) / cos 10 deg)
    from twinring import cosmology
    from twinring.config import config_from_dict

    d1 = math.pi / 5
    k, ok = bound.spherical_limits(10.0, d1)
    assert math.tan(d1 / 2) / math.tan(k) == pytest.approx(math.cos(math.radians(10.0)), rel=1e-12)
    cosmo = config_from_dict({"cosmology": {"omega_k": ok}}).cosmology
    assert cosmology.chi_over_r(cosmo) == pytest.approx(k, rel=1e-6)
    assert -0.5 < ok < 0
    # flat limit: a tiny image distance (L(p,1), large p) gives the flat rule d = 2 chi cos(alpha_min)
    small = 2 * math.pi / 400
    k_small, _ = bound.spherical_limits(10.0, small)
    assert small / k_small == pytest.approx(2 * math.cos(math.radians(10.0)), rel=1e-4)
    # the statement speaks of chi/R and Omega_k, not of a flat size
    n = np.full(2, 100)
    rec = Table({"radius_deg": [10.0, 30.0], "n": n, "detected": n, "fraction": np.ones(2)})
    row = bound.bound_row(rec, 0.95, 0.05, [], 2.0, d1, 13.9, "I*", geometry="spherical", n_sims=99)
    assert row["chi_over_r_max"] == pytest.approx(k) and row["size_chi"] == pytest.approx(1 / k)
    text = bound.statement(row)
    assert "chi/R <" in text and "Omega_k >" in text
