"""Predicted circle pairs (pipeline/topology/circles.py) and the predict stage."""
from __future__ import annotations

import numpy as np
import pytest

from twinring import rings
from twinring.config import config_from_dict
from twinring.results import read_table
from twinring.topology import manifolds as M
from twinring.topology.circles import COLUMNS, predict_circles, predict_pairs
from twinring.topology.stages import run_predict


def radii(rows):
    return np.array([r["radius_deg"] for r in rows])


@pytest.mark.parametrize("L", [1.2, 1.5, 1.9])
def test_cubic_torus_radii(L):
    # Cornish, Spergel & Starkman 1998 (CQG 15, 2657): a cubic torus of side L shows three back-to-back pairs at
    # cos(alpha) = L/2 and six more at cos(alpha) = L sqrt(2)/2 when L sqrt(2) < 2 (here L sqrt(3) > 2 and
    # 2L > 2, so there are no others); the same from every observer (Riazuelo et al. 2004).
    rng = np.random.default_rng(4)
    for obs in [(0, 0, 0), tuple(rng.uniform(-L / 2, L / 2, 3))]:
        rows = predict_pairs(M.build_space("E1", [L, L, L], observer=obs))
        face = np.degrees(np.arccos(L / 2))
        edge = np.degrees(np.arccos(L * np.sqrt(2) / 2)) if L * np.sqrt(2) < 2 else None
        r = radii(rows)
        assert np.sum(np.isclose(r, face)) == 3
        if edge is not None:
            assert np.sum(np.isclose(r, edge)) == 6
        assert len(rows) == 3 + (6 if edge is not None else 0)
        assert all(r_["separation_deg"] == pytest.approx(180.0) for r_ in rows)


def test_no_pairs_when_domain_exceeds_sphere():
    # cos(alpha) = d/2 has no solution once every image is at d >= 2 (Cornish, Spergel & Starkman 1998).
    assert predict_pairs(M.build_space("E1", [2.05, 2.2, 3.0], observer=(0.3, -0.2, 0.1))) == []
    assert predict_pairs(M.build_space("E2", [2.1, 2.2, 2.05], observer=(0.3, 0.0, 0.0))) == []
    assert predict_pairs(M.build_space("E6", [2.01, 2.1, 2.2], observer=(0.1, 0.2, 0.3))) == []
    assert predict_pairs(M.build_space("E18", [])) == []
    # just inside: one pair appears
    assert len(predict_pairs(M.build_space("E1", [1.99, 2.2, 3.0]))) == 1


def test_cubic_torus_side_1p2_nine_pairs():
    # Acceptance check (issue 3): six at 31.95 deg, three at 53.13 deg, all flip true, twist 0.
    t = predict_circles(M.build_space("E1", [1.2, 1.2, 1.2]))
    assert len(t) == 9
    assert np.sum(np.isclose(t["radius_deg"], 31.95, atol=0.005)) == 6
    assert np.sum(np.isclose(t["radius_deg"], 53.13, atol=0.005)) == 3
    assert all(t["flip"])
    assert np.allclose(np.minimum(t["twist_deg"], 360 - t["twist_deg"]), 0, atol=1e-6)
    assert tuple(t.colnames) == COLUMNS


def test_half_turn_space_single_pair():
    # Acceptance check: E2 [2.5, 2.5, 1.2] from (0.3, 0, 0): g x0 - x0 = (-0.6, 0, 1.2), d = sqrt(1.8),
    # cos(alpha) = d/2 -> 47.87 deg; centres (-0.6, 0, +-1.2) 126.87 deg apart; a screw motion: flip true.
    t = predict_circles(M.build_space("E2", [2.5, 2.5, 1.2], observer=(0.3, 0, 0)))
    assert len(t) == 1
    assert t["radius_deg"][0] == pytest.approx(47.87, abs=0.005)
    assert t["separation_deg"][0] == pytest.approx(126.87, abs=0.005)
    assert bool(t["flip"][0]) is True
    assert t["distance"][0] == pytest.approx(np.sqrt(1.8))


@pytest.mark.parametrize("name, turn", [("E2", 180.0), ("E3", 90.0), ("E4", 120.0), ("E5", 60.0)])
def test_screw_twist_equals_turn_on_axis(name, turn):
    # An observer on the screw axis sees the screw's pair back-to-back about the axis, traversed in opposite
    # senses (flip true), with a twist equal to the screw's rotation angle (Cornish, Spergel & Starkman 1998;
    # the phase origins are both +x for centres at the poles, twinring.rings convention).
    lengths = [3.0, 3.0, 0.8] if name == "E2" else [3.0, 0.8]
    rows = predict_pairs(M.build_space(name, lengths))
    first = [r for r in rows if r["distance"] == pytest.approx(0.8)]
    assert len(first) == 1
    r = first[0]
    assert r["flip"] is True and r["separation_deg"] == pytest.approx(180.0)
    assert r["lat1_deg"] == pytest.approx(90.0)
    assert r["twist_deg"] == pytest.approx(turn, abs=1e-6)
    second = [r for r in rows if r["distance"] == pytest.approx(1.6)]
    assert len(second) == 1 and second[0]["twist_deg"] == pytest.approx((2 * turn) % 360.0, abs=1e-6)


def test_sense_translations_screws_flip_glides_do_not():
    # Weeks, The Shape of Space: the two views of a circle are traversed in opposite senses for translations
    # and screw motions (flip true) and in the same sense for glide reflections (flip false).
    seen = set()
    for name in M.SPACE_NAMES:
        lengths = {3: [0.9, 1.0, 0.8], 2: [0.9, 0.8], 1: [0.8], 0: []}[max(M._NLEN[name])]
        if name in ("E3", "E4", "E5"):
            lengths = [0.9, 0.8]
        ang = [90.0] if name == "E16" else None
        s = M.build_space(name, lengths, ang, observer=(0.05, 0.1, -0.04))
        for r in predict_pairs(s):
            seen.add(r["orientation_reversing"])
            assert r["flip"] is (not r["orientation_reversing"]), (name, r["element"])
    assert seen == {True, False}


def test_off_axis_observers_see_pairs_that_are_not_back_to_back():
    # Riazuelo et al. 2004: only in the torus are all pairs back-to-back from every observer.
    on = predict_pairs(M.build_space("E2", [2.5, 2.5, 1.2]))
    off = predict_pairs(M.build_space("E2", [2.5, 2.5, 1.2], observer=(0.3, 0, 0)))
    assert on[0]["separation_deg"] == pytest.approx(180.0)
    assert off[0]["separation_deg"] < 170.0


def test_pairs_are_listed_once_and_match_geometry():
    s = M.build_space("E6", [0.7, 0.8, 0.9], observer=(0.1, 0.2, 0.05), euler_deg=(20, 30, 40))
    rows = predict_pairs(s)
    x0 = s.observer
    keys = set()
    for r in rows:
        c1 = rings.lonlat_to_vec(r["lon1_deg"], r["lat1_deg"])
        c2 = rings.lonlat_to_vec(r["lon2_deg"], r["lat2_deg"])
        k = tuple(np.round(np.concatenate([c1, c2]), 6))
        k_rev = tuple(np.round(np.concatenate([c2, c1]), 6))
        assert k not in keys and k_rev not in keys
        keys.add(k)
        assert np.cos(np.radians(r["radius_deg"])) == pytest.approx(r["distance"] / 2)
        # every point of circle 1 lies on the sphere |x - x0| = 1 and on one image sphere |x - g x0| = 1
        pts = rings.ring_points(c1, np.radians(r["radius_deg"]), 12, other=c2)[0] + x0
        dist_to_images = [np.max(np.abs(np.linalg.norm(pts - g(x0), axis=1) - 1)) for _, g, _ in
                          M.elements_within(s, 2.0)]
        assert min(dist_to_images) < 1e-9
    # count: elements with d < 2 come in inverse pairs
    assert 2 * len(rows) == len(M.elements_within(s, 2.0))


def test_run_predict_writes_tables(tmp_path):
    cfg = config_from_dict({"topology": {"space": "E1", "lengths": [1.2, 1.2, 1.2]}}, source="t.yaml")
    path = run_predict(cfg, tmp_path)
    assert path.name == "circles.ecsv" and path.with_suffix(".fits").exists()
    t = read_table(path)
    assert len(t) == 9 and tuple(t.colnames) == COLUMNS
    assert t.meta["space"] == "E1" and t.meta["stage"] == "predict" and "config_hash" in t.meta
    f = read_table(path.with_suffix(".fits"))
    assert len(f) == 9
    # Gpc units give the same circles
    from twinring.cosmology import chi_ls_gpc

    chi = chi_ls_gpc()
    cfg2 = config_from_dict({"topology": {"space": "E1", "lengths": [1.2 * chi] * 3, "units": "Gpc"}})
    t2 = read_table(run_predict(cfg2, tmp_path / "gpc"))
    assert np.allclose(np.sort(t2["radius_deg"]), np.sort(t["radius_deg"]))


def test_images_that_only_touch_the_sphere_give_no_circle():
    # cubic torus of side sqrt(2) chi: edge images at d = 2 chi only touch the sphere (cos a = 1,
    # CSS 1998), so just the three face pairs at cos a = sqrt(2)/2 (45 deg) remain
    import math
    from twinring.topology.manifolds import build_space
    from twinring.topology.circles import predict_circles
    t = predict_circles(build_space("E1", [math.sqrt(2)] * 3))
    assert len(t) == 3
    assert all(abs(float(r) - 45.0) < 1e-6 for r in t["radius_deg"])
