"""The flat spaces: classification, holonomy, free action, lattices, parameters (pipeline/topology/manifolds.py)."""
from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from twinring.config import InputError, config_from_dict
from twinring.topology import manifolds as M

# one valid parameter set per space (lengths, angles, observer), small enough to have short elements
PARAMS = {
    "E1": ([1.0, 1.1, 1.2], None), "E2": ([1.0, 1.1, 0.6], None), "E3": ([1.0, 0.6], None),
    "E4": ([1.0, 0.6], None), "E5": ([1.0, 0.6], None), "E6": ([0.7, 0.8, 0.9], None),
    "E7": ([0.7, 1.1, 1.2], None), "E8": ([0.7, 1.1, 1.2], None), "E9": ([0.7, 1.1, 0.6], None),
    "E10": ([0.7, 1.1, 0.6], None), "E11": ([1.0, 1.1], None), "E12": ([1.0, 0.6], None),
    "E13": ([0.7, 1.2], None), "E14": ([0.7, 1.1], None), "E15": ([0.7, 0.6], None),
    "E16": ([0.8], [90.0]), "E17": ([0.8], None), "E18": ([], None),
}
OBS = (0.11, -0.07, 0.05)


def space(name, **kw):
    L, ang = PARAMS[name]
    return M.build_space(name, L, ang, kw.pop("observer", OBS), kw.pop("euler_deg", (0, 0, 0)))


def test_ten_compact_six_orientable():
    # Exactly 10 compact flat 3-manifolds, 6 orientable (Wolf, Spaces of Constant Curvature; common practice).
    built = {n: space(n) for n in M.SPACE_NAMES}
    compact = [n for n, s in built.items() if s.compact]
    assert compact == [f"E{i}" for i in range(1, 11)]
    assert sum(built[n].orientable for n in compact) == 6
    assert [n for n in compact if not built[n].orientable] == ["E7", "E8", "E9", "E10"]
    # orientable non-compact ones: E11, E12, E16, E18 (Riazuelo et al. 2004 numbering, from memory)
    assert sorted(n for n, s in built.items() if not s.compact and s.orientable) == ["E11", "E12", "E16", "E18"]


def test_holonomy_orders_and_structure():
    # Orders 1, 2, 4, 3, 6, 4 (E1-E6) and 2, 2, 4, 4 (E7-E10) (Wolf; Riazuelo et al. 2004, PRD 69, 103518;
    # from memory), computed here by closing the generators' rotation parts.
    orders = [space(f"E{i}").holonomy_order() for i in range(1, 11)]
    assert orders == [1, 2, 4, 3, 6, 4, 2, 2, 4, 4]
    for name, cyclic in (("E3", True), ("E4", True), ("E5", True), ("E6", False), ("E9", False), ("E10", False)):
        Rs = [h.R for _, h in space(name).holonomy]
        n = len(Rs)
        orders_el = []
        for R in Rs:
            P, k = R.copy(), 1
            while not np.allclose(P, np.eye(3)):
                P, k = P @ R, k + 1
            orders_el.append(k)
        # Z_n has an element of order n; Z2 x Z2 has every element of order <= 2
        assert (max(orders_el) == n) == cyclic
    # closure: the representatives' rotation parts form a group
    for name in M.SPACE_NAMES:
        Rs = [h.R for _, h in space(name).holonomy]
        for A, B in itertools.product(Rs, Rs):
            assert any(np.allclose(A @ B, C) for C in Rs)


def test_group_acts_freely():
    # A flat manifold's group has no element with a fixed point other than the identity (Bieberbach; Wolf).
    # Orientation-reversing elements must be glide reflections (no rotary reflections).
    for name in M.SPACE_NAMES:
        s = space(name)
        for label, g, d in M.elements_within(s, 3.0):
            assert not M.has_fixed_point(g), (name, label)
            if np.linalg.det(g.R) < 0:
                eig = np.sort(np.linalg.eigvals(g.R).real)
                assert np.allclose(eig, [-1, 1, 1]), (name, label)


def _words(gens, length):
    letters = [(lab, g) for lab, g in gens] + [(lab + "^-1", g.inverse()) for lab, g in gens]
    ident = M.Isometry(np.eye(3), np.zeros(3))
    out = [ident]
    for n in range(1, length + 1):
        for combo in itertools.product(letters, repeat=n):
            e = ident
            for _, g in combo:
                e = g @ e
            out.append(e)
    return out


def test_lattice_is_the_translation_subgroup():
    # The cover torus must be exactly the group's translations: every pure translation among short words lies
    # on the lattice, and every lattice basis vector is such a translation (common practice for Bieberbach
    # groups: translations form a normal lattice subgroup of finite index = holonomy order).
    for name in M.SPACE_NAMES:
        s = space(name)
        if s.lattice.shape[1] == 0:
            continue
        words = _words(s.generators, 3)
        for _, g in s.generators:                       # powers reach screw translations such as c^6 (E5)
            e = g
            for _ in range(2, s.holonomy_order() + 1):
                e = g @ e
                words.append(e)
        trans = [w.t for w in words if np.allclose(w.R, np.eye(3))]
        for t in trans:
            coords = np.linalg.lstsq(s.lattice, t, rcond=None)[0]
            assert np.allclose(s.lattice @ coords, t, atol=1e-9) and np.allclose(coords, np.rint(coords), atol=1e-9)
        for i in range(s.lattice.shape[1]):
            v = s.lattice[:, i]
            assert any(np.allclose(t, v, atol=1e-9) for t in trans), (name, i)
        # holonomy maps the lattice to itself
        for _, h in s.holonomy:
            img = h.R @ s.lattice
            coords = np.linalg.lstsq(s.lattice, img, rcond=None)[0]
            assert np.allclose(coords, np.rint(coords), atol=1e-9)


def test_volumes():
    # E2 with lengths [a, b, c]: the half-turn screw translates by c, the cover torus has period 2c, and the
    # space has volume a b c (half the cover torus) -- the acceptance parameterisation.
    s = M.build_space("E2", [2.5, 2.5, 1.2])
    assert np.allclose(s.lattice, np.diag([2.5, 2.5, 2.4]))
    assert s.volume() == pytest.approx(2.5 * 2.5 * 1.2)
    # Hantzsche-Wendt with screw translations a, b, c: cover 2a x 2b x 2c, volume 2abc (Wolf; from memory).
    s = M.build_space("E6", [0.7, 0.8, 0.9])
    assert s.volume() == pytest.approx(2 * 0.7 * 0.8 * 0.9)
    # E1 with angles: cell volume a b c sqrt(1 - cos^2 a - cos^2 b - cos^2 g + 2 cos a cos b cos g)
    # (triclinic cell volume, common practice).
    al, be, ga = 80.0, 70.0, 100.0
    s = M.build_space("E1", [1.0, 1.1, 1.2], [al, be, ga])
    ca, cb, cg = np.cos(np.radians([al, be, ga]))
    assert s.volume() == pytest.approx(1.32 * np.sqrt(1 - ca**2 - cb**2 - cg**2 + 2 * ca * cb * cg))
    lat = s.lattice
    ang = lambda u, v: np.degrees(np.arccos(u @ v / np.linalg.norm(u) / np.linalg.norm(v)))  # noqa: E731
    assert ang(lat[:, 1], lat[:, 2]) == pytest.approx(al)
    assert ang(lat[:, 0], lat[:, 2]) == pytest.approx(be)
    assert ang(lat[:, 0], lat[:, 1]) == pytest.approx(ga)


def test_euler_convention_matches_scipy_and_rotates_everything():
    # z-y-z intrinsic Euler angles: scipy's Rotation.from_euler('ZYZ').
    e = (30.0, 40.0, 50.0)
    assert np.allclose(M.euler_matrix(e), Rotation.from_euler("ZYZ", e, degrees=True).as_matrix())
    a = M.build_space("E3", [1.0, 0.6], observer=(0.2, 0.1, 0.05))
    b = M.build_space("E3", [1.0, 0.6], observer=(0.2, 0.1, 0.05), euler_deg=e)
    Q = M.euler_matrix(e)
    assert np.allclose(b.observer, Q @ a.observer)
    da = sorted((round(d, 9), lab) for lab, _, d in M.elements_within(a, 2.0))
    db = sorted((round(d, 9), lab) for lab, _, d in M.elements_within(b, 2.0))
    assert da == db
    ga = {lab: g for lab, g, _ in M.elements_within(a, 2.0)}
    for lab, g, _ in M.elements_within(b, 2.0):
        assert np.allclose(g(b.observer) - b.observer, Q @ (ga[lab](a.observer) - a.observer))


def test_element_enumeration_is_complete():
    # Brute force over words: every short word moving the observer by less than 2 is among the listed elements.
    s = M.build_space("E9", [0.7, 1.1, 0.6], observer=OBS)
    listed = {M._key(g.R, g.t) for _, g, _ in M.elements_within(s, 2.0)}
    for w in _words(s.generators, 3):
        d = np.linalg.norm(w(s.observer) - s.observer)
        if 1e-12 < d < 2.0:
            assert M._key(w.R, w.t) in listed


@pytest.mark.parametrize("raw, key", [
    ({"space": "E2", "lengths": [2.5, 1.2]}, "topology.lengths"),
    ({"space": "E1", "lengths": [1.0, 0.0, 1.0]}, "topology.lengths"),
    ({"space": "E3", "lengths": [1.0, 1.5, 0.5]}, "topology.lengths"),
    ({"space": "E6", "lengths": [1, 1, 1], "angles_deg": [80]}, "topology.angles_deg"),
    ({"space": "E16", "lengths": [1.0], "angles_deg": [50.0]}, "topology.angles_deg"),
    ({"space": "E1", "lengths": [1, 1, 1], "angles_deg": [10, 10, 170]}, "topology.angles_deg"),
    ({"space": "E1", "lengths": [1, 1, 1], "observer": [0.6, 0, 0]}, "topology.observer"),
    ({"space": "E2", "lengths": [2.5, 2.5, 1.2], "observer": [0, 0, 1.3]}, "topology.observer"),
    ({"space": "E19"}, "topology.space"),
    ({"space": "E1", "units": "Mpc"}, "topology.units"),
])
def test_bad_parameters_name_the_key(raw, key):
    with pytest.raises(InputError) as exc:
        config_from_dict({"topology": raw}, source="run.yaml")
    msg = str(exc.value)
    assert msg.startswith(f"run.yaml: {key}: found ") and "allowed:" in msg and "\n" not in msg


def test_open_directions_accept_any_observer_coordinate():
    # Chimneys are unbounded along their open direction: the observer may sit anywhere along it.
    M.build_space("E11", [1.0, 1.1], observer=(0.1, 0.2, 7.5))
    with pytest.raises(M.ParamError):
        M.build_space("E11", [1.0, 1.1], observer=(0.6, 0.2, 7.5))


def test_gpc_units_convert_with_the_cosmology():
    from twinring.cosmology import chi_ls_gpc
    from twinring.topology.manifolds import space_from_config

    chi = chi_ls_gpc()
    cfg = config_from_dict({"topology": {"space": "E1", "lengths": [1.2 * chi] * 3, "units": "Gpc",
                                         "observer": [0.1 * chi, 0, 0]}})
    s = space_from_config(cfg.topology, cfg.cosmology)
    assert np.allclose(s.lattice, 1.2 * np.eye(3))
    assert np.allclose(s.observer, [0.1, 0, 0])


@pytest.mark.parametrize("name", ["E7", "E8", "E13"])
def test_monoclinic_cell_angle(name):
    # E7 (Pc), E8 (Cc) and E13 keep a free angle beta in the mirror plane between the glide axis and c
    # (monoclinic cells; International Tables for Crystallography, Vol. A, from memory).  With beta != 90 deg
    # the group must still act freely, be non-orientable, close on its lattice, and the cover cell have
    # volume 2a b c sin(beta) (E13: area 2a c sin(beta)); beta = 90 is the default.
    L = {"E7": [0.7, 1.1, 1.2], "E8": [0.7, 1.1, 1.2], "E13": [0.7, 1.2]}[name]
    s = M.build_space(name, L, [70.0], (0.05, 0.1, -0.1))
    assert s.holonomy_order() == 2 and not s.orientable
    for label, g, d in M.elements_within(s, 3.0):
        assert not M.has_fixed_point(g), label
    a, c = L[0], L[-1]
    if s.compact:
        assert s.cover_volume() == pytest.approx(2 * a * L[1] * c * math.sin(math.radians(70.0)), rel=1e-12)
    else:
        G = s.lattice.T @ s.lattice
        assert math.sqrt(np.linalg.det(G)) == pytest.approx(2 * a * c * math.sin(math.radians(70.0)), rel=1e-12)
    for _, h in s.holonomy:
        coords = np.linalg.lstsq(s.lattice, h.R @ s.lattice, rcond=None)[0]
        assert np.allclose(coords, np.rint(coords), atol=1e-9)
    sq = [g @ g for _, g in s.generators]                     # the glide squared is a lattice translation
    for e in sq:
        coords = np.linalg.lstsq(s.lattice, e.t, rcond=None)[0]
        assert np.allclose(s.lattice @ coords, e.t) and np.allclose(coords, np.rint(coords), atol=1e-9)
    d90 = M.build_space(name, L, [90.0])
    d0 = M.build_space(name, L)
    assert np.allclose(d90.lattice, d0.lattice) and np.allclose(d90.generators[-1][1].t, d0.generators[-1][1].t)
    with pytest.raises(M.ParamError):
        M.build_space(name, L, [180.0])
