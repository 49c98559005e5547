"""What the data exclude: every flat space over its parameters and the observer's position.

A flat space is E^3 / Gamma; every element g(x) = R x + t of Gamma other than the
identity is a closed geodesic of the space.  For one parameter point (the space's
lengths and angles in units of the last-scattering distance chi, and the observer
x0 in the domain frame) this module computes, from the group elements of
twinring.topology.manifolds:

clone distance
    d0 = min |g x0 - x0| over g != identity: the length of the shortest closed
    geodesic through the observer (the observer to its nearest image).
shortest loop
    loop_min = min over g != identity of min over x of |g x - x|, the shortest
    closed geodesic anywhere in the space.  min_x |(R - I) x + t| is the length of
    the projection of t onto the fixed space of R (the range of R - I is the
    orthogonal complement of that fixed space): for a translation |t|, for a screw
    motion its translation along the axis, for a glide reflection its translation
    within the mirror.  At distance rho from a screw axis turning by psi,
    |g x - x|^2 = t_par^2 + 4 rho^2 sin^2(psi / 2) (elementary geometry; COMPACT
    Part I, Petersen et al. 2023, arXiv 2211.02603).  loop_min does not depend on
    the observer; E1 (translations only) has loop_min = d0 for every observer.
largest circle
    an image at distance d < 2 chi makes a circle pair of angular radius alpha,
    cos alpha = d / (2 chi) (Cornish, Spergel & Starkman 1998); the largest is
    made by the nearest image.  The pair's centres are u = g x0 - x0 and
    g^-1 x0 - x0 = -R^T u, so their separation is 180 deg - angle(u, R u): the
    pair is back-to-back exactly when u lies in the fixed space of R (always for
    translations; for a screw only on its axis, for a glide only in its mirror).

Verdict: a point is excluded when the space shows at least one circle pair that
the search would have seen: radius >= alpha_min (and, with coverage ``run``,
within the search's radius range) and a centre separation the search covers
(``general``: any; ``antipodal``: within ``exclude.antipodal_tol_deg`` of 180 deg;
``run``: the run's own pair family and separation range).

The stage ``twinring exclude CONFIG`` (config section ``exclude``) evaluates
listed points (an ECSV table) or points sampled over configured ranges with a
scrambled Sobol or Halton sequence (scipy.stats.qmc) or a grid, and writes

* ``exclusion.ecsv``: one row per point (listed points in input order) with the
  point's columns, ``clone_distance_chi``, ``loop_min_chi``, ``axis_offset_chi``
  (the observer's distance from the nearest shortest loop), ``alpha_max_deg``
  (NaN when the nearest image is at 2 chi or beyond: no circle),
  ``separation_deg`` and ``back_to_back`` (of that largest pair; ties count as
  back-to-back when any of them is), ``alpha_covered_deg`` (the largest circle
  the coverage sees, NaN when none) and ``excluded``;
* ``exclusion_summary.ecsv`` (sampled runs): per space the number of points,
  how many are excluded, and the smallest allowed ``loop_min_chi`` and
  ``clone_distance_chi`` as fractions of 2 chi, with the point that reached
  it.  A sampled minimum is an upper bound on the true infimum over the ranges.

Units: lengths in chi, angles in degrees at every interface.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .config import InputError
from .topology import manifolds as M

EXCLUSION = "exclusion.ecsv"
SUMMARY = "exclusion_summary.ecsv"
FIGURE_PREFIX = "fig_exclusion_"
SPACES = tuple(f"E{i}" for i in range(1, 18))       # E18 has no loops: nothing to exclude
_EPS = 1e-9


# the group geometry (clone distance, shortest loops) lives in twinring.topology.loops
from .topology.loops import (axis_offset, clone_distance, displacements, group_arrays, loop_lengths,  # noqa: F401
                             loop_min, separations_deg)


def circle_radius_deg(d):
    """Angular radius (deg) of the circle pair made by an image at distance d (chi); NaN for d >= 2
    (twinring.topology.geometry, flat)."""
    from .topology.geometry import circle_radius_deg as radius

    return radius(d, 0.0)


# --------------------------------------------------------------------------- coverage and verdict
@dataclass(frozen=True)
class Coverage:
    """Which circle pairs the search sees: radius within [radius_lo, radius_hi] deg and centre
    separation within [sep_lo, sep_hi] deg."""

    kind: str
    radius_lo: float
    radius_hi: float = 90.0
    sep_lo: float = 0.0
    sep_hi: float = 180.0

    def sees(self, alpha_deg, sep_deg):
        a = np.asarray(alpha_deg, float)
        s = np.asarray(sep_deg, float)
        ok = np.isfinite(a) & (a >= self.radius_lo - 1e-9) & (a <= self.radius_hi + 1e-9)
        return ok & (s >= self.sep_lo - 1e-9) & (s <= self.sep_hi + 1e-9)


def make_coverage(kind, alpha_min_deg, antipodal_tol_deg=1.0, family=None, radius_range=None, sep_range=None):
    """Coverage from the config: ``general``, ``antipodal`` or ``run`` (the search's family and ranges)."""
    a = float(alpha_min_deg)
    if kind == "general":
        return Coverage("general", a)
    if kind == "antipodal":
        return Coverage("antipodal", a, 90.0, 180.0 - antipodal_tol_deg, 180.0)
    if kind == "run":
        lo, hi = radius_range
        if family == "antipodal":
            slo, shi = 180.0 - antipodal_tol_deg, 180.0
        else:
            slo, shi = sep_range
        return Coverage(f"run ({family})", max(a, float(lo)), float(hi), float(slo), float(shi))
    raise ValueError(kind)


def evaluate(space: M.Space, coverage: Coverage, antipodal_tol_deg=1.0) -> dict:
    """Clone distance, shortest loop, largest circle and verdict of one built space (observer inside)."""
    G = group_arrays(space)
    x = space.observer
    loops = loop_lengths(G)
    lmin = float(np.min(loops))
    d0 = clone_distance(G, x)
    # every pair of radius >= radius_lo: images closer than 2 cos(radius_lo)
    reach = max(d0 * (1 + 1e-7) + _EPS, min(2.0, 2.0 * math.cos(math.radians(coverage.radius_lo))) + 1e-9)
    u, h = displacements(G, x, reach)
    d = np.linalg.norm(u, axis=1)
    sep = separations_deg(u, G.R[h])
    alpha = circle_radius_deg(d)
    near = d <= d0 * (1 + 1e-9) + 1e-12
    if d0 < 2.0 - 1e-12:
        a_max = float(circle_radius_deg(d0))
        sep_max = float(np.max(sep[near]))
        b2b = bool(sep_max >= 180.0 - antipodal_tol_deg - 1e-9)
    else:
        a_max, sep_max, b2b = math.nan, math.nan, False
    seen = coverage.sees(alpha, sep)
    a_cov = float(np.max(alpha[seen])) if np.any(seen) else math.nan
    return dict(clone_distance_chi=d0, loop_min_chi=lmin, axis_offset_chi=axis_offset(G, x, loops),
                alpha_max_deg=a_max, separation_deg=sep_max, back_to_back=b2b, alpha_covered_deg=a_cov,
                excluded=bool(np.any(seen)))


# --------------------------------------------------------------------------- parameter points
@dataclass(frozen=True)
class Point:
    """One parameter point: lengths (chi) and angles (deg) as topology.lengths / angles_deg, observer in the
    domain frame (chi)."""

    space: str
    lengths: tuple
    angles: tuple | None
    observer: tuple


def sample_lengths_count(name) -> int:
    """How many lengths a sampled point of the space has (E3-E5: [a, c])."""
    return min(M._NLEN[name])


def sample_angles_count(name) -> int:
    """How many continuous angles a sampled point has (E16's twist is drawn from a list instead)."""
    return 0 if name == "E16" else M._NANG.get(name, 0)


def sample_dimension(name) -> int:
    return sample_lengths_count(name) + sample_angles_count(name) + (1 if name == "E16" else 0) + 3


def unit_points(dim, n, method="sobol", seed=0):
    """n points of the unit cube [0, 1)^dim: scrambled Sobol or Halton (scipy.stats.qmc) or a grid of cell
    centres (floor(n^(1/dim)) per axis, so at most n points)."""
    if method == "grid":
        k = max(1, int(math.floor(n ** (1.0 / dim) + 1e-9)))
        axes = [(np.arange(k) + 0.5) / k] * dim
        return np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, dim)
    import warnings

    from scipy.stats import qmc

    rng = np.random.default_rng(seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed))
    eng = qmc.Sobol(dim, scramble=True, seed=rng) if method == "sobol" else qmc.Halton(dim, scramble=True, seed=rng)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")       # Sobol balance warning for counts that are not powers of two
        return eng.random(n)


def points_from_unit(name, U, length_range, angle_range, twists, open_range):
    """Map unit-cube rows to parameter points of one space.  Returns (points, n_rejected): rows whose
    angles make no cell (E1) are dropped."""
    nl, na = sample_lengths_count(name), sample_angles_count(name)
    lo, hi = length_range
    alo, ahi = angle_range
    out, rejected = [], 0
    for row in np.atleast_2d(U):
        L = tuple(float(lo + (hi - lo) * v) for v in row[:nl])
        j = nl
        ang = None
        if na:
            ang = tuple(float(alo + (ahi - alo) * v) for v in row[j:j + na])
            j += na
        if name == "E16":
            ang = (float(twists[min(int(row[j] * len(twists)), len(twists) - 1)]),)
            j += 1
        try:
            sp = M.build_space(name, L, ang)
        except M.ParamError:
            rejected += 1
            continue
        f = row[j:j + 3] - 0.5
        m = sp.lattice.shape[1]
        x = sp.lattice @ f[:m] + sp.open_dirs @ (2.0 * open_range * f[m:])
        out.append(Point(name, L, ang, tuple(float(v) for v in x)))
    return out, rejected


def sampled_points(name, ex, index=0):
    """The sampled parameter points of one space from the ``exclude`` section (seed spawned per space)."""
    seed = np.random.SeedSequence(ex.seed).spawn(index + 1)[index]
    U = unit_points(sample_dimension(name), ex.samples, ex.sampling, seed)
    return points_from_unit(name, U, ex.length_range_chi, ex.angle_range_deg, ex.twists_deg, ex.open_range_chi)


def listed_points(path, name):
    """Parameter points of space ``name`` from an ECSV table (columns l1_chi.., angle1_deg.., observer_*_chi)."""
    from .results import read_table

    t = read_table(path, "exclude.points table")
    cols = set(t.colnames)
    counts = [n for n in M._NLEN[name] if all(f"l{i}_chi" in cols for i in range(1, n + 1))]
    if not counts:
        need = " or ".join(", ".join(f"l{i}_chi" for i in range(1, n + 1)) for n in M._NLEN[name])
        raise InputError(f"{path}: exclude.points table lacks length columns for {name}; allowed: {need}")
    nl = max(counts)
    nang = M._NANG.get(name, 0)
    acols = [c for c in (f"angle{i}_deg" for i in range(1, 4)) if c in cols]
    if acols and not nang:
        raise InputError(f"{path}: exclude.points table has {', '.join(acols)}; allowed: no angle columns for {name}")
    if acols and acols != [f"angle{i}_deg" for i in range(1, nang + 1)]:
        raise InputError(f"{path}: exclude.points angle columns {', '.join(acols)}; allowed: "
                         f"{', '.join(f'angle{i}_deg' for i in range(1, nang + 1))} for {name}")
    ocols = ["observer_x_chi", "observer_y_chi", "observer_z_chi"]
    missing = [c for c in ocols if c not in cols]
    if missing:
        raise InputError(f"{path}: exclude.points table lacks {', '.join(missing)}; allowed: observer_x_chi, "
                         "observer_y_chi, observer_z_chi (domain frame, chi)")
    if len(t) == 0:
        raise InputError(f"{path}: exclude.points table has no rows; allowed: at least one point")
    out = []
    for i, r in enumerate(t):
        try:
            L = tuple(float(r[f"l{k}_chi"]) for k in range(1, nl + 1))
            ang = tuple(float(r[c]) for c in acols) if acols else None
            obs = tuple(float(r[c]) for c in ocols)
        except (TypeError, ValueError) as exc:
            raise InputError(f"{path}: exclude.points row {i}: not a number ({exc}); allowed: numbers")
        try:
            M.check_params(name, L, ang, obs)
        except M.ParamError as exc:
            col = {"lengths": "l*_chi", "angles_deg": "angle*_deg", "observer": "observer_*_chi"}.get(exc.key, exc.key)
            raise InputError(f"{path}: exclude.points row {i}: {col}: found {exc.found}; allowed: {exc.allowed}")
        out.append(Point(name, L, ang, obs))
    return out


def evaluate_point(p: Point, coverage: Coverage, antipodal_tol_deg=1.0) -> dict:
    sp = M.build_space(p.space, p.lengths, p.angles, p.observer)
    return evaluate(sp, coverage, antipodal_tol_deg)


# --------------------------------------------------------------------------- tables
RESULT_COLUMNS = ("clone_distance_chi", "loop_min_chi", "axis_offset_chi", "alpha_max_deg", "separation_deg",
                  "back_to_back", "alpha_covered_deg", "excluded")


def exclusion_table(points, results):
    """One row per point: space, l1_chi.., angle1_deg.., observer_*_chi and the results (NaN where a space has
    fewer lengths or angles than others in the table)."""
    from astropy.table import Table

    nl = max(len(p.lengths) for p in points)
    na = max(len(p.angles) if p.angles else 0 for p in points)
    t = Table()
    t["space"] = [p.space for p in points]
    for i in range(nl):
        t[f"l{i + 1}_chi"] = [p.lengths[i] if i < len(p.lengths) else np.nan for p in points]
    for i in range(na):
        t[f"angle{i + 1}_deg"] = [p.angles[i] if p.angles and i < len(p.angles) else np.nan for p in points]
    for k, c in enumerate("xyz"):
        t[f"observer_{c}_chi"] = [p.observer[k] for p in points]
    for c in RESULT_COLUMNS:
        t[c] = np.array([r[c] for r in results], dtype=bool if c in ("back_to_back", "excluded") else float)
    for c in t.colnames:
        if c.endswith("_deg"):
            t[c].unit = "deg"
            t[c].info.format = ".4f"
        elif c.endswith("_chi"):
            t[c].info.format = ".6f"
    return t


def summary_rows(table, rejected=None):
    """Per space: counts and the smallest allowed loop_min and clone distance as fractions of 2 chi."""
    rows = []
    for name in dict.fromkeys(table["space"]):
        sub = table[table["space"] == name]
        ok = sub[~np.asarray(sub["excluded"], bool)]
        row = dict(space=name, n_points=len(sub), n_rejected=int((rejected or {}).get(name, 0)),
                   n_excluded=int(np.sum(sub["excluded"])), n_allowed=len(ok),
                   loop_min_allowed_frac=np.nan, clone_distance_allowed_frac=np.nan, factor=np.nan, best_point="")
        if len(ok):
            i = int(np.argmin(ok["loop_min_chi"]))
            row["loop_min_allowed_frac"] = float(ok["loop_min_chi"][i]) / 2.0
            row["clone_distance_allowed_frac"] = float(np.min(ok["clone_distance_chi"])) / 2.0
            row["factor"] = 2.0 / float(ok["loop_min_chi"][i])
            r = ok[i]
            L = [float(r[c]) for c in r.colnames if re.fullmatch(r"l\d_chi", c) and np.isfinite(r[c])]
            A = [float(r[c]) for c in r.colnames if c.startswith("angle") and np.isfinite(r[c])]
            O = [float(r[f"observer_{c}_chi"]) for c in "xyz"]
            row["best_point"] = (f"lengths {np.round(L, 4).tolist()}" + (f" angles {np.round(A, 2).tolist()}" if A
                                 else "") + f" observer {np.round(O, 4).tolist()}")
        rows.append(row)
    return rows


def summary_table(rows):
    from astropy.table import Table

    names = ["space", "n_points", "n_rejected", "n_excluded", "n_allowed", "loop_min_allowed_frac",
             "clone_distance_allowed_frac", "factor", "best_point"]
    t = Table(rows=[[r[n] for n in names] for r in rows], names=names,
              dtype=[str, int, int, int, int, float, float, float, str])
    for c in ("loop_min_allowed_frac", "clone_distance_allowed_frac", "factor"):
        t[c].info.format = ".4f"
    return t


# --------------------------------------------------------------------------- the stage
def alpha_min_for(cfg, run_dir) -> tuple:
    """(alpha_min in deg, where it came from): exclude.alpha_min_deg or the run's bound.ecsv."""
    if cfg.exclude.alpha_min_deg is not None:
        return float(cfg.exclude.alpha_min_deg), "exclude.alpha_min_deg"
    from .bound import BOUND
    from .results import read_table

    p = Path(run_dir) / BOUND
    if not p.exists():
        raise InputError(f"{cfg.source}: exclude.alpha_min_deg: found null and no {p}; allowed: a radius in "
                         "degrees, or run `twinring bound` first")
    t = read_table(p, "bound table")
    a = float(t["alpha_min_deg"][0]) if len(t) and "alpha_min_deg" in t.colnames else math.nan
    if not math.isfinite(a):
        raise InputError(f"{p}: alpha_min_deg: found {a}; allowed: a finite bound (the run set none), or set "
                         "exclude.alpha_min_deg")
    return a, str(p)


def coverage_for(cfg, alpha_min_deg) -> Coverage:
    ex = cfg.exclude
    if ex.coverage == "run":
        s = cfg.search
        if s.family == "listed":
            raise InputError(f"{cfg.source}: exclude.coverage: found 'run' with search.family 'listed'; allowed: "
                             "general | antipodal (a listed search covers no family of pairs)")
        return make_coverage("run", alpha_min_deg, ex.antipodal_tol_deg, s.family, s.radius_deg[:2],
                             s.separation_deg)
    return make_coverage(ex.coverage, alpha_min_deg, ex.antipodal_tol_deg)


def spaces_for(cfg):
    return list(cfg.exclude.spaces) or [cfg.topology.space]


def check_exclude(cfg):
    """Checks that need no work (before any output is written)."""
    from .exclude_spherical import check_spherical, wants_spherical

    if wants_spherical(cfg):
        check_spherical(cfg)
        if not cfg.exclude.spaces:
            return
    for name in spaces_for(cfg):
        if name not in SPACES:
            raise InputError(f"{cfg.source}: topology.space: found {name!r}; allowed: E1-E17 for exclude "
                             "(E18 has no closed loops)")
    if cfg.exclude.points:
        listed_points(cfg.exclude.points, spaces_for(cfg)[0])


def exclude_run(cfg, run):
    """The exclude stage on an open run: exclusion.ecsv (+ summary for sampled runs). Returns summary lines."""
    from .results import provenance, write_table

    check_exclude(cfg)
    ex = cfg.exclude
    a_min, a_src = alpha_min_for(cfg, run.dir)
    cov = coverage_for(cfg, a_min)
    from .exclude_spherical import spherical_exclude_run, wants_spherical

    sph_lines = spherical_exclude_run(cfg, run, a_min, a_src, cov) if wants_spherical(cfg) else []
    if sph_lines and not ex.spaces:
        return sph_lines
    rejected = {}
    if ex.points:
        pts = listed_points(ex.points, spaces_for(cfg)[0])
    else:
        pts = []
        for name in spaces_for(cfg):
            got, rej = sampled_points(name, ex, int(name[1:]))
            pts += got
            rejected[name] = rej
    results = [evaluate_point(p, cov, ex.antipodal_tol_deg)
               for p in run.progress(pts, desc="exclude", unit="point")]
    t = exclusion_table(pts, results)
    meta = provenance(cfg, {"points": ex.points} if ex.points else None, "exclude")
    meta.update(alpha_min_deg=a_min, alpha_min_source=a_src, coverage=cov.kind,
                coverage_radius_deg=[cov.radius_lo, cov.radius_hi], coverage_separation_deg=[cov.sep_lo, cov.sep_hi],
                antipodal_tol_deg=ex.antipodal_tol_deg,
                points="listed: " + str(ex.points) if ex.points else
                f"sampled: {ex.sampling}, {ex.samples} per space, seed {ex.seed}, lengths {list(ex.length_range_chi)} "
                f"chi, angles {list(ex.angle_range_deg)} deg, E16 twists {list(ex.twists_deg)} deg, open directions "
                f"within +-{ex.open_range_chi} chi, observer uniform over the cover-torus cell",
                frame="observer in the domain frame (twinring.topology.manifolds), lengths in chi",
                rule="excluded: some circle pair has radius alpha >= alpha_min (cos alpha = d / 2 chi) within the "
                     "coverage's radius and separation ranges")
    write_table(t, run.dir / EXCLUSION, meta)
    n_ex = int(np.sum(t["excluded"]))
    lines = [f"exclusion: {len(t)} points, {n_ex} excluded (alpha_min {a_min:.2f} deg from {a_src}, coverage "
             f"{cov.kind}) -> {EXCLUSION}"]
    if not ex.points:
        rows = summary_rows(t, rejected)
        st = summary_table(rows)
        write_table(st, run.dir / SUMMARY, dict(meta, what="per space: the smallest allowed loop_min_chi and "
                                                "clone_distance_chi over the sampled points, as fractions of 2 chi "
                                                "(a sampled minimum: an upper bound on the infimum)"))
        for r in rows:
            lines.append(f"{r['space']}: {r['n_allowed']}/{r['n_points']} allowed; smallest allowed shortest loop "
                         f"{r['loop_min_allowed_frac']:.3f} x 2 chi, loop through the observer "
                         f"{r['clone_distance_allowed_frac']:.3f} x 2 chi")
    return lines + sph_lines


def cmd_exclude(args):
    from .rundir import open_run
    from .inputs import load_run_config

    from .rundir import resolve_out

    cfg = load_run_config(args)
    check_exclude(cfg)
    coverage_for(cfg, alpha_min_for(cfg, resolve_out(cfg, args.out))[0])     # bad input before any output
    run = open_run(cfg, args.out, args.force, "exclude")
    run.finish(exclude_run(cfg, run))
    return 0


# --------------------------------------------------------------------------- figures
def exclusion_figures(run_dir, dpi=110):
    """One PNG per space in the run's exclusion.ecsv (``fig_exclusion_<space>.png``); returns their paths.

    Left: the shortest loop (fraction of 2 chi) against the observer's distance from it (chi), excluded
    and allowed points (for E2: the screw's axis length against the observer's distance from the axis).
    Right: the distribution of the allowed points' shortest loops and loops through the observer,
    with the smallest allowed loop marked.  Nothing is drawn when the table is absent.
    """
    from .results import atomic_path, read_table

    d = Path(run_dir)
    p = d / EXCLUSION
    if not p.exists():
        return []
    t = read_table(p, EXCLUSION)
    if len(t) == 0:
        return []
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    a_min = float(t.meta.get("alpha_min_deg", math.nan))
    out = []
    for name in dict.fromkeys(t["space"]):
        sub = t[t["space"] == name]
        ex = np.asarray(sub["excluded"], bool)
        loop = np.asarray(sub["loop_min_chi"], float) / 2.0
        clone = np.asarray(sub["clone_distance_chi"], float) / 2.0
        off = np.asarray(sub["axis_offset_chi"], float)
        fig, (a1, a2) = plt.subplots(1, 2, figsize=(10.5, 4.2))
        a1.scatter(off[ex], loop[ex], s=6, c="C3", alpha=0.5, lw=0, label=f"excluded ({int(ex.sum())})")
        a1.scatter(off[~ex], loop[~ex], s=8, c="C0", alpha=0.8, lw=0, label=f"allowed ({int((~ex).sum())})")
        a1.set_xlabel("observer's distance from the shortest loop [chi]")
        a1.set_ylabel("shortest loop / 2 chi")
        a1.set_title(f"{name} ({M.TITLES[name]})", fontsize=9)
        a1.legend(fontsize=8, loc="best")
        if np.any(~ex):
            bins = np.linspace(0.0, max(1.2, float(np.nanmax(np.r_[loop[~ex], clone[~ex]]))), 40)
            a2.hist(loop[~ex], bins=bins, color="C0", alpha=0.7, label="shortest loop anywhere")
            a2.hist(clone[~ex], bins=bins, color="C1", alpha=0.5, label="loop through the observer")
            lo = float(np.min(loop[~ex]))
            a2.axvline(lo, color="C0", ls="--", lw=1.2, label=f"smallest allowed: {lo:.3f}")
            if math.isfinite(a_min):
                a2.axvline(math.cos(math.radians(a_min)), color="k", ls=":", lw=1.0,
                           label=f"cos(alpha_min = {a_min:.1f} deg)")
        a2.set_xlabel("length / 2 chi (allowed points)")
        a2.set_ylabel("points")
        a2.set_title(f"N = {len(sub)} points, coverage {t.meta.get('coverage', '?')}", fontsize=9)
        a2.legend(fontsize=7, loc="best")
        fig.tight_layout()
        path = d / f"{FIGURE_PREFIX}{name}.png"
        with atomic_path(path) as tmp:
            fig.savefig(tmp, dpi=dpi, format="png", bbox_inches="tight")
        plt.close(fig)
        out.append(path)
    return out
