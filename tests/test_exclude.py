"""What the data exclude (pipeline/exclude.py): clone distances, shortest loops, verdicts, the stage.

Checks against elementary geometry, COMPACT Part I (Petersen et al. 2023, arXiv 2211.02603) and brute-force
enumerations of group elements written here, independently of the module.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from astropy.table import Table
from scipy.optimize import minimize

from twinring import exclude as X
from twinring.cli import main
from twinring.topology import manifolds as M

COS10 = math.cos(math.radians(10.0))


# --------------------------------------------------------------------------- brute force (independent)
def _m4(R, t):
    m = np.eye(4)
    m[:3, :3] = R
    m[:3, 3] = t
    return m


def _rz(deg):
    c, s = math.cos(math.radians(deg)), math.sin(math.radians(deg))
    return np.array([[c, -s, 0], [s, c, 0], [0, 0, 1.0]])


def words(gens, depth=7, tmax=25.0):
    """Every product of at most ``depth`` generators and inverses (4x4 matrices), deduplicated, translations
    below tmax (a breadth-first closure; a subset of the group, so minima over it are upper bounds)."""
    letters = list(gens) + [np.linalg.inv(g) for g in gens]
    key = lambda m: tuple(np.round(m[:3], 7).ravel() + 0.0)   # noqa: E731
    seen = {key(np.eye(4)): np.eye(4)}
    frontier = [np.eye(4)]
    for _ in range(depth):
        new = []
        for h in frontier:
            for g in letters:
                e = g @ h
                k = key(e)
                if k not in seen and np.linalg.norm(e[:3, 3]) < tmax:
                    seen[k] = e
                    new.append(e)
        frontier = new
    els = np.array(list(seen.values()))
    ident = np.all(np.isclose(els, np.eye(4)), axis=(1, 2))
    return els[~ident]


def brute_displacements(els, x):
    x = np.asarray(x, float)
    return np.einsum("nij,j->ni", els[:, :3, :3], x) + els[:, :3, 3] - x


def brute_clone(els, x):
    return float(np.min(np.linalg.norm(brute_displacements(els, x), axis=1)))


def brute_largest_pair(els, x):
    """(radius deg, largest separation deg among the nearest images' pairs), separations measured directly
    between the centres g x - x and g^-1 x - x."""
    u = brute_displacements(els, x)
    w = brute_displacements(np.linalg.inv(els), x)
    d = np.linalg.norm(u, axis=1)
    near = d <= d.min() * (1 + 1e-9)
    cosang = np.einsum("ni,ni->n", u, w)[near] / (d[near] * np.linalg.norm(w[near], axis=1))
    return math.degrees(math.acos(d.min() / 2)), float(np.max(np.degrees(np.arccos(np.clip(cosang, -1, 1)))))


def brute_verdict(els, x, alpha_min_deg, antipodal_tol=None):
    """Excluded when some image at d <= 2 cos(alpha_min), d < 2, has its pair (centres g x - x and
    g^-1 x - x, measured directly) back-to-back within antipodal_tol (None: any separation)."""
    u = brute_displacements(els, x)
    d = np.linalg.norm(u, axis=1)
    inv = np.linalg.inv(els)
    w = brute_displacements(inv, x)
    ok = (d <= 2 * math.cos(math.radians(alpha_min_deg)) + 1e-12) & (d < 2 - 1e-12)
    if antipodal_tol is not None:
        cosang = np.einsum("ni,ni->n", u, w) / np.maximum(d * np.linalg.norm(w, axis=1), 1e-300)
        sep = np.degrees(np.arccos(np.clip(cosang, -1, 1)))
        ok &= sep >= 180 - antipodal_tol - 1e-9
    return bool(np.any(ok))


def own_generators(name, L):
    """E1-E3 generators written from their textbook definitions (not from manifolds.py)."""
    if name == "E1":      # rectangular three-torus
        a, b, c = L
        return [_m4(np.eye(3), [a, 0, 0]), _m4(np.eye(3), [0, b, 0]), _m4(np.eye(3), [0, 0, c])]
    if name == "E2":      # half-turn space: half turn about z with translation c along it
        a, b, c = L
        return [_m4(np.eye(3), [a, 0, 0]), _m4(np.eye(3), [0, b, 0]), _m4(_rz(180), [0, 0, c])]
    if name == "E3":      # quarter-turn space
        a, c = L
        return [_m4(np.eye(3), [a, 0, 0]), _m4(np.eye(3), [0, a, 0]), _m4(_rz(90), [0, 0, c])]
    raise ValueError(name)


def module_generators(space):
    return [g.matrix4() for _, g in space.generators]


def brute_loop_min(els, lattice, grid=10, starts=6):
    """min over observer positions of the brute-force clone distance: a grid over the cover cell, then
    Nelder-Mead from the best grid points (the shortest loop anywhere, found by searching for it)."""
    f = (np.arange(grid) + 0.5) / grid - 0.5
    F = np.stack(np.meshgrid(f, f, f, indexing="ij"), -1).reshape(-1, 3)
    m = lattice.shape[1]
    X0 = F[:, :m] @ lattice.T
    vals = np.array([brute_clone(els, x) for x in X0])
    best = math.inf
    for i in np.argsort(vals)[:starts]:
        r = minimize(lambda x: brute_clone(els, x), X0[i], method="Nelder-Mead",
                     options=dict(xatol=1e-9, fatol=1e-11, maxiter=4000))
        best = min(best, float(r.fun))
    return best


def G_of(space):
    return X.group_arrays(space)


# --------------------------------------------------------------------------- geometry
@pytest.mark.parametrize("psi", [60.0, 90.0, 120.0, 180.0])
def test_screw_clone_distance(psi):
    # A turn psi about an axis at distance rho with translation L along it moves a point by
    # sqrt(L^2 + 4 rho^2 sin^2(psi/2)) (elementary geometry; COMPACT Part I, Petersen et al. 2023).
    # E16 is generated by one screw motion, so the clone distance is the minimum over its powers k.
    q = round(360 / psi)
    for c, rho in ((0.4, 0.1), (0.5, 0.3), (0.3, 0.9), (0.7, 0.0)):
        s = M.build_space("E16", [c], [psi], (rho * 0.6, rho * 0.8, 0.05))
        want = min(math.sqrt((k * c) ** 2 + 4 * rho ** 2 * math.sin(math.radians(k * psi) / 2) ** 2)
                   for k in range(1, q + 1))
        assert X.clone_distance(G_of(s), s.observer) == pytest.approx(want, rel=1e-10)
        assert X.loop_min(G_of(s)) == pytest.approx(c, rel=1e-12)          # the translation along the axis
    # E2 (half turn, psi = 180): far from the other axes the screw is the nearest image
    s = M.build_space("E2", [6.0, 6.0, 0.9], None, (0.5, 0.0, 0.2))
    assert X.clone_distance(G_of(s), s.observer) == pytest.approx(math.sqrt(0.9 ** 2 + 4 * 0.5 ** 2), rel=1e-10)


def test_e1_every_loop_passes_every_observer():
    # E1: translations only, each moves every point by the same amount: loop_min = clone distance
    # (COMPACT Part I; elementary), for oblique cells and any observer.
    rng = np.random.default_rng(3)
    for _ in range(12):
        L = rng.uniform(0.5, 2.5, 3)
        ang = rng.uniform(70, 110, 3)
        s = M.build_space("E1", L, ang)
        f = rng.uniform(-0.5, 0.5, 3)
        x = s.lattice @ f
        G = G_of(s)
        assert X.clone_distance(G, x) == pytest.approx(X.loop_min(G), rel=1e-12)
        assert X.axis_offset(G, x) == 0.0
    # and the value is the shortest lattice vector, from a brute-force word enumeration
    s = M.build_space("E1", [1.0, 1.3, 0.8], [75, 100, 65])
    els = words(module_generators(s), depth=5)
    assert X.loop_min(G_of(s)) == pytest.approx(brute_clone(els, np.zeros(3)), rel=1e-12)


# one parameter set per space with short loops, where a grid over the cell finds the minimum
LOOP_CASES = {
    "E2": ([1.0, 1.2, 0.6], None), "E3": ([1.1, 0.5], None), "E4": ([1.2, 0.45], None), "E5": ([1.2, 0.3], None),
    "E6": ([0.7, 0.9, 0.5], None), "E7": ([0.45, 1.0, 0.9], None), "E8": ([0.45, 1.0, 0.9], None),
    "E9": ([0.45, 1.0, 0.55], None), "E10": ([0.6, 1.0, 0.55], None),
}


@pytest.mark.parametrize("name", sorted(LOOP_CASES, key=lambda n: int(n[1:])))
def test_loop_min_against_brute_force_over_observers(name):
    # loop_min is the shortest closed geodesic anywhere: it must equal the brute-force clone distance
    # minimised over observer positions (grid + Nelder-Mead), an independent search.
    L, ang = LOOP_CASES[name]
    s = M.build_space(name, L, ang)
    els = words(module_generators(s), depth=6, tmax=6.0)
    brute = brute_loop_min(els, s.lattice)
    assert X.loop_min(G_of(s)) == pytest.approx(brute, rel=1e-6, abs=1e-7)
    # the loop through one observer is never shorter than the shortest loop anywhere
    x = s.lattice @ np.array([0.21, -0.33, 0.4])
    assert X.clone_distance(G_of(s), x) >= X.loop_min(G_of(s)) - 1e-12
    assert X.clone_distance(G_of(s), x) == pytest.approx(brute_clone(els, x), rel=1e-10)


def test_axis_offset_is_distance_from_screw_axis():
    # E16 with a quarter turn: the shortest loop is the screw's axis (the z axis); the observer's offset
    # is its distance from that axis (elementary geometry).
    s = M.build_space("E16", [0.5], [90.0], (0.3, -0.4, 0.2))
    assert X.axis_offset(G_of(s), s.observer) == pytest.approx(0.5, rel=1e-10)
    # E17: a glide reflection in the plane y = 0: the offset is |y|
    s = M.build_space("E17", [0.5], None, (0.3, -0.7, 0.2))
    assert X.axis_offset(G_of(s), s.observer) == pytest.approx(0.7, rel=1e-10)


# --------------------------------------------------------------------------- verdicts
def test_full_coverage_alpha10_allowed_loops_through_observer():
    # COMPACT Part I (Petersen et al. 2023, abstract): with no circles above 10 deg, the shortest loop
    # through us exceeds 98.5 % of the last-scattering diameter (cos 10 deg = 0.9848).  Sampled points of
    # every space E1-E17 with full coverage: allowed <=> clone distance >= 2 cos 10 deg.
    cov = X.make_coverage("general", 10.0)
    n_allowed = 0
    for i, name in enumerate(X.SPACES):
        U = X.unit_points(X.sample_dimension(name), 24, "sobol", seed=100 + i)
        pts, _ = X.points_from_unit(name, U, (0.4, 3.0), (70.0, 110.0), (0.0, 90.0, 180.0), 1.5)
        for p in pts:
            r = X.evaluate_point(p, cov)
            if not r["excluded"]:
                n_allowed += 1
                assert r["clone_distance_chi"] / 2.0 >= round(COS10, 4)      # 0.9848, COMPACT's "98.5 %"
                assert r["clone_distance_chi"] >= r["loop_min_chi"] - 1e-12
            else:
                assert r["clone_distance_chi"] <= 2 * COS10 + 1e-12
    assert n_allowed > 20
    # and on a few of them the verdict agrees with an independent word enumeration
    for name, L, obs in (("E2", (2.2, 2.5, 1.3), (0.9, -0.7, 0.3)), ("E3", (2.1, 1.0), (0.8, 0.6, -1.0)),
                         ("E1", (2.0, 2.3, 1.9), (0.1, 0.2, 0.3))):
        s = M.build_space(name, L, None, obs)
        els = words(own_generators(name, L), depth=6)
        assert X.evaluate(s, cov)["excluded"] == brute_verdict(els, s.observer, 10.0)


# points where the observer sits far from every screw axis: short loops elsewhere, none through us
OFF_AXIS = {
    # space: (lengths, observer, expected loop_min / 2 chi)
    "E2": ((4.0, 4.0, 1.0), (1.0, 1.0, 0.0), 0.5),           # pure translation 2c = 2 chi: c >= ~chi
    "E3": ((6.0, 0.5), (1.5, 1.5, 0.0), 0.25),                # 4c = 2 chi
    "E4": ((8.0, 0.66), (2.0, 1.1547, 0.0), 0.33),            # 3c = 1.98 chi
    "E5": ((8.0, 0.33), (2.0, 1.1547, 0.0), 0.165),           # 6c = 1.98 chi: the factor 6
    "E6": ((4.0, 4.0, 1.0), (1.0, 1.0, 0.0), 0.5),
}


@pytest.mark.parametrize("name", sorted(OFF_AXIS))
def test_off_axis_observers_allow_short_loops(name):
    # COMPACT Part I: in E2-E6 the shortest loop elsewhere can be shorter than the last-scattering diameter
    # by a factor from 2 to at least 6 while no circle above 10 deg is seen.  Checked with words.
    L, obs, frac = OFF_AXIS[name]
    s = M.build_space(name, L, None, obs)
    r = X.evaluate(s, X.make_coverage("general", 10.0))
    assert not r["excluded"]
    assert r["loop_min_chi"] / 2.0 == pytest.approx(frac, rel=1e-9)
    assert r["loop_min_chi"] < 1.05                           # well below 2 chi
    els = words(module_generators(s), depth=7, tmax=12.0)
    assert r["clone_distance_chi"] == pytest.approx(brute_clone(els, s.observer), rel=1e-10)
    assert not brute_verdict(els, s.observer, 10.0)


def test_antipodal_coverage_misses_off_axis_pairs():
    # Riazuelo et al. 2004 (PRD 69, 103518): observers off the screw axis see pairs that are not back-to-back;
    # a back-to-back search misses them.  E2, observer 0.4 chi off the axis: the screw's pair is the largest.
    s = M.build_space("E2", [3.0, 3.0, 0.8], None, (0.4, 0.0, 0.0))
    els = words(own_generators("E2", (3.0, 3.0, 0.8)), depth=6)
    gen = X.evaluate(s, X.make_coverage("general", 10.0))
    anti = X.evaluate(s, X.make_coverage("antipodal", 10.0, 1.0))
    assert gen["excluded"] and brute_verdict(els, s.observer, 10.0)
    assert not gen["back_to_back"]
    a, sep = brute_largest_pair(els, s.observer)
    assert (gen["alpha_max_deg"], gen["separation_deg"]) == pytest.approx((a, sep), rel=1e-9)
    # the pure translation 2c = 1.6 still makes a back-to-back pair: excluded either way
    assert anti["excluded"] == brute_verdict(els, s.observer, 10.0, antipodal_tol=1.0) is True
    # with 2c beyond the sphere only the off-axis pairs remain: the antipodal search sees nothing
    s = M.build_space("E2", [3.0, 3.0, 1.05], None, (0.4, 0.0, 0.0))
    els = words(own_generators("E2", (3.0, 3.0, 1.05)), depth=6)
    assert X.evaluate(s, X.make_coverage("general", 10.0))["excluded"]
    assert not X.evaluate(s, X.make_coverage("antipodal", 10.0, 1.0))["excluded"]
    assert not brute_verdict(els, s.observer, 10.0, antipodal_tol=1.0)


# --------------------------------------------------------------------------- the stage
LISTED = {
    "E1": [((1.0, 1.2, 1.5), (0.1, 0.2, -0.3)), ((2.0, 2.1, 2.2), (0.0, 0.0, 0.0)), ((1.9, 2.5, 3.0), (0.5, -1, 1))],
    "E2": [((2.5, 2.5, 1.2), (0.3, 0.0, 0.0)), ((4.0, 3.5, 1.0), (1.0, 0.9, 0.2)), ((1.5, 2.0, 0.7), (0.7, 0.9, 0))],
    "E3": [((2.0, 0.6), (0.4, 0.3, 0.1)), ((6.0, 0.5), (1.5, 1.5, 0.0)), ((3.0, 0.55), (1.4, 0.2, 0.5))],
}


@pytest.mark.parametrize("name", ["E1", "E2", "E3"])
def test_listed_points_match_independent_enumeration(tmp_path, name):
    # Done-when of the issue: listed points of E1-E3, clone distances and verdicts (general and antipodal)
    # against an independent word enumeration of textbook generators.
    rows = LISTED[name]
    t = Table()
    for i in range(len(rows[0][0])):
        t[f"l{i + 1}_chi"] = [r[0][i] for r in rows]
    for k, c in enumerate("xyz"):
        t[f"observer_{c}_chi"] = [r[1][k] for r in rows]
    t.write(tmp_path / "pts.ecsv", format="ascii.ecsv")
    for coverage, tol in (("general", None), ("antipodal", 1.0)):
        cfg = tmp_path / f"{coverage}.yaml"
        cfg.write_text(f"topology: {{space: {name}, lengths: {list(rows[0][0])}}}\n"
                       f"exclude: {{points: pts.ecsv, alpha_min_deg: 12.0, coverage: {coverage}}}\n"
                       f"output: {{dir: {tmp_path / coverage}}}\n")
        assert main(["exclude", str(cfg)]) == 0
        out = Table.read(tmp_path / coverage / "exclusion.ecsv")
        assert len(out) == len(rows)
        assert out.meta["alpha_min_deg"] == 12.0 and out.meta["tool"] == "twinring"
        for r, (L, obs) in zip(out, rows):
            assert tuple(r[f"observer_{c}_chi"] for c in "xyz") == pytest.approx(obs)
            els = words(own_generators(name, L), depth=6)
            assert r["clone_distance_chi"] == pytest.approx(brute_clone(els, obs), rel=1e-10)
            assert bool(r["excluded"]) == brute_verdict(els, obs, 12.0, tol)
            if r["clone_distance_chi"] < 2:
                a, sep = brute_largest_pair(els, obs)
                assert r["alpha_max_deg"] == pytest.approx(a, rel=1e-9)
                assert r["separation_deg"] == pytest.approx(sep, abs=1e-6)
                assert bool(r["back_to_back"]) == (sep >= 179.0)
        assert not (tmp_path / coverage / X.SUMMARY).exists()


def test_sampled_stage_summary_and_alpha_from_bound(tmp_path):
    # alpha_min from the run's bound.ecsv; per-space summary of the smallest allowed loops
    out = tmp_path / "run"
    out.mkdir()
    Table({"space": ["x"], "alpha_min_deg": [10.0]}).write(out / "bound.ecsv", format="ascii.ecsv")
    cfg = tmp_path / "c.yaml"
    cfg.write_text("topology: {space: E2, lengths: [2.5, 2.5, 1.2]}\n"
                   "exclude: {spaces: [E2, E17], samples: 64, length_range_chi: [0.5, 3.0]}\n"
                   f"output: {{dir: {out}}}\n")
    assert main(["exclude", str(cfg)]) == 0
    t = Table.read(out / "exclusion.ecsv")
    s = Table.read(out / "exclusion_summary.ecsv")
    assert t.meta["alpha_min_source"].endswith("bound.ecsv")
    assert list(s["space"]) == ["E2", "E17"] and list(s["n_points"]) == [64, 64]
    for row in s:
        sub = t[(t["space"] == row["space"]) & ~t["excluded"]]
        assert row["n_allowed"] == len(sub)
        assert row["loop_min_allowed_frac"] == pytest.approx(np.min(sub["loop_min_chi"]) / 2)
        assert np.all(sub["clone_distance_chi"] > 2 * COS10)
    # the same config twice gives the same points (seeded sequence)
    t2 = Table.read(out / "exclusion.ecsv")
    assert main(["exclude", str(cfg)]) == 0
    assert np.array_equal(Table.read(out / "exclusion.ecsv")["observer_x_chi"], t2["observer_x_chi"])


def test_bad_inputs_one_line(tmp_path, capsys):
    # common practice, no source: bad input -> one line naming the key, exit status 2
    cfg = tmp_path / "c.yaml"
    cfg.write_text(f"topology: {{space: E2, lengths: [2.5, 2.5, 1.2]}}\nexclude: {{samples: 8}}\n"
                   f"output: {{dir: {tmp_path / 'o'}}}\n")
    assert main(["exclude", str(cfg)]) == 2
    err = capsys.readouterr().err.strip()
    assert "exclude.alpha_min_deg" in err and len(err.splitlines()) == 1
    Table({"l1_chi": [1.0], "observer_x_chi": [0.0]}).write(tmp_path / "p.ecsv", format="ascii.ecsv")
    cfg.write_text(f"topology: {{space: E2, lengths: [2.5, 2.5, 1.2]}}\n"
                   f"exclude: {{points: p.ecsv, alpha_min_deg: 10}}\noutput: {{dir: {tmp_path / 'o'}}}\n")
    assert main(["exclude", str(cfg)]) == 2
    err = capsys.readouterr().err.strip()
    assert "p.ecsv" in err and "l1_chi, l2_chi, l3_chi" in err
    cfg.write_text("topology: {space: E18, lengths: []}\nexclude: {alpha_min_deg: 10}\n")
    assert main(["exclude", str(cfg)]) == 2
    assert "E18" in capsys.readouterr().err
    cfg.write_text("exclude: {spaces: [E2, E19], alpha_min_deg: 10}\n")
    assert main(["exclude", str(cfg)]) == 2
    assert "exclude.spaces" in capsys.readouterr().err
    assert not (tmp_path / "o" / "exclusion.ecsv").exists()


def test_run_executes_exclude_and_report_draws_it(tmp_path):
    # `twinring run`: exclude runs when configured (after bound), the report draws one figure per space,
    # and an unchanged rerun skips it (common practice, no source)
    import yaml

    from twinring import workflow

    out = tmp_path / "out"
    cfg = {"topology": {"space": "E1", "lengths": [1.5, 1.5, 1.5]},
           "sky": {"nside": 16, "lmax": 32, "fwhm_deg": 5.0, "seed": 1},
           "prepare": {"nside": 16, "lmax": 32, "fwhm_deg": 6.0},
           "search": {"nside_centers": 2, "radius_deg": [40, 60, 20], "top": 3, "refine": False},
           "exclude": {"spaces": ["E1", "E4"], "samples": 16, "alpha_min_deg": 10.0, "coverage": "run"},
           "output": {"dir": str(out)}, "compute": {"progress": False}}
    path = tmp_path / "run.yaml"
    path.write_text(yaml.safe_dump(cfg))
    status = workflow.run_workflow(workflow.load_config(path), echo=lambda s: None)
    assert status["exclude"] == "ran" and list(status)[-2:] == ["exclude", "report"]
    t = Table.read(out / "exclusion.ecsv")
    assert t.meta["coverage"] == "run (antipodal)" and t.meta["coverage_radius_deg"] == [40.0, 60.0]
    assert (out / "fig_exclusion_E1.png").exists() and (out / "fig_exclusion_E4.png").exists()
    assert "fig_exclusion_E4.png" in (out / "summary.md").read_text()
    # run coverage: only back-to-back pairs with radius 40-60 deg count; check each verdict directly
    for r in t:
        ang = [r[f"angle{i}_deg"] for i in (1, 2, 3) if np.isfinite(r[f"angle{i}_deg"])]
        s = M.build_space(r["space"], [r[f"l{i}_chi"] for i in (1, 2, 3) if np.isfinite(r[f"l{i}_chi"])],
                          ang or None, [r[f"observer_{c}_chi"] for c in "xyz"])
        els = words(module_generators(s), depth=6)
        u = brute_displacements(els, s.observer)
        w = brute_displacements(np.linalg.inv(els), s.observer)
        d = np.linalg.norm(u, axis=1)
        with np.errstate(invalid="ignore"):
            alpha = np.degrees(np.arccos(np.clip(d / 2, -1, 1)))
        sep = np.degrees(np.arccos(np.clip(np.einsum("ni,ni->n", u, w) / (d * np.linalg.norm(w, axis=1)), -1, 1)))
        seen = (d < 2) & (alpha >= 40 - 1e-9) & (alpha <= 60 + 1e-9) & (sep >= 179.0)
        assert bool(r["excluded"]) == bool(np.any(seen))
    status = workflow.run_workflow(workflow.load_config(path), echo=lambda s: None)
    assert status["exclude"] == "skipped"
