"""From a non-detection to a lower bound on the size of space.

alpha_min is the smallest radius of the injection campaign such that

* at that radius and at every larger campaign radius, the one-sided 95 %
  Clopper-Pearson lower limit of the recovered fraction reaches
  ``bound.recovery`` (recovery.ecsv): 59 of 59 for 95 %; 3 of 3 never does.
  The point fraction is used only with ``bound.point_fraction: true``, and the
  statement says so; and
* no candidate or peak of the data has ``p_global`` at or below the
  significance level (``bound.false_alarm``, unset: ``calibrate.significance``),
  counted only when the calibration's N simulations resolve that level.  When
  significant circles are found the headline names them and there is no bound.

A space whose largest visible circles would be larger than alpha_min would
have been seen, so it is excluded.  Every distance |g x0 - x0| scales with the
size, and a circle has cos(alpha) = d / (2 chi) (Cornish, Spergel & Starkman
1998), so the excluded sizes are those below

    size_min = 2 chi cos(alpha_min) / d1,

d1 the smallest visible distance at size 1 (recovery.ecsv's meta
``distance_per_size``; d1 = 1 for the cubic three-torus, L > 2 chi cos alpha_min).
Spaces smaller than the campaign's smallest size have larger and more circles
and are taken as excluded too.

chi (Gpc): ``bound.chi_gpc``, or the comoving distance to last scattering of
the ``cosmology`` section (twinring.cosmology.chi_ls_gpc).
"""
from __future__ import annotations

import math

import numpy as np
from astropy.table import Table

from .config import InputError
from .significance import all_recovered_needed, lower_limit, resolvable

BOUND = "bound.ecsv"


def size_bound(alpha_min_deg, d1=1.0, chi=1.0):
    """Smallest size not excluded: 2 chi cos(alpha_min) / d1 (cubic torus: L > 2 chi cos alpha_min)."""
    return 2.0 * float(chi) * math.cos(math.radians(float(alpha_min_deg))) / float(d1)


def spherical_limits(alpha_min_deg, d1, cosmo=None):
    """A spherical space's limits from alpha_min: (largest chi/R not excluded, its Omega_k).

    The nearest visible image lies at d1 (in curvature radii R), and its circle has
    cos(alpha) = tan(d1/2) / tan(chi/R) (Cornish, Spergel & Starkman 1998), which grows with
    chi/R; spaces with chi/R above arctan(tan(d1/2) / cos(alpha_min)) show circles larger than
    alpha_min and are excluded.  Omega_k is the curvature giving that chi/R with the other
    parameters of ``cosmo`` (NaN when none in [-0.5, 0) does).
    """
    from scipy.optimize import brentq

    from .cosmology import chi_over_r_at

    k = math.atan(math.tan(0.5 * float(d1)) / math.cos(math.radians(float(alpha_min_deg))))
    try:
        ok = brentq(lambda x: chi_over_r_at(x, cosmo) - k, -0.5, -1e-8, xtol=1e-10)
    except ValueError:
        ok = float("nan")
    return k, float(ok)


def alpha_min(radii, fractions, level=0.95, significant_radii=(), radius_tol=0.0):
    """Smallest campaign radius above which recovery >= level everywhere and nothing significant was found.

    Returns NaN when no radius qualifies.
    """
    r = np.asarray(radii, float)
    f = np.asarray(fractions, float)
    order = np.argsort(r)
    r, f = r[order], f[order]
    sig = np.asarray(list(significant_radii), float)
    best = float("nan")
    for i in range(r.size - 1, -1, -1):
        if not (np.isfinite(f[i]) and f[i] >= level):
            break
        if sig.size and np.any(sig >= r[i] - radius_tol):
            break
        best = float(r[i])
    return best


def significant_rows(tables, level, n_sims):
    """Rows (radius, flip, p_global, S) with p_global <= level, only when N simulations resolve the level."""
    if not resolvable(level, n_sims):
        return []
    out = []
    for t in tables:
        if t is None or len(t) == 0:
            continue
        p = np.asarray(t["p_global"], float)
        s = np.asarray(t["s_grid"] if "s_grid" in t.colnames else t["s"], float)
        for i in np.flatnonzero(np.isfinite(p) & (p <= level)):
            out.append((float(t["radius_deg"][i]), bool(t["flip"][i]), float(p[i]), float(s[i])))
    return out


def space_name(meta) -> str:
    from .topology.manifolds import TITLES

    name = str(meta.get("space", "E1"))
    title = TITLES.get(name, name)
    lengths = meta.get("shape_lengths") or []
    if name == "E1" and len(lengths) == 3 and np.allclose(lengths, lengths[0]):
        title = "cubic three-torus"
    return f"{title} ({name})"


MEASURES = {"lower_95": "one-sided 95 % lower limit of the recovered fraction (Clopper-Pearson)",
            "fraction": "point fraction of injected skies recovered (no confidence statement; bound.point_fraction)"}


def statement(row) -> str:
    """One sentence with the headline: a detection, a bound, or why there is none."""
    n_sims = row["n_sims"]
    if row["n_significant"]:
        return (f"Matched circles detected: {row['detections']} "
                f"(p_global <= {row['false_alarm']:g} from {n_sims} simulations); no bound on the size of space.")
    physics = f" Injections: {row['physics']}." if row.get("physics") else ""
    if not np.isfinite(row["alpha_min_deg"]):
        if row["n_needed"] > row["n_max"] and row["recovery_measure"] == "lower_95":
            why = (f"{row['n_max']} realisation(s) per radius cannot show {row['recovery_level']:.0%} recovery at 95 % "
                   f"confidence even if all are recovered; {row['n_needed']} of {row['n_needed']} are needed")
        else:
            why = f"no campaign radius reached {row['recovery_level']:.0%} recovery ({MEASURES[row['recovery_measure']]})"
        return (f"No bound on the {row['space']}: {why} (largest campaign radius "
                f"{row['radius_max_deg']:.1f} deg).{physics}")
    evidence = (f"No matched circles with radius above {row['alpha_min_deg']:.1f} deg "
                f"({MEASURES[row['recovery_measure']]} >= {row['recovery_level']:.0%} at {row['n_at_alpha']} "
                f"injected skies per radius; no candidate with p_global <= {row['false_alarm']:g} from {n_sims} "
                f"simulations), so ")
    if row.get("geometry") == "spherical":
        ok = row.get("omega_k_min", float("nan"))
        tail = (f", i.e. Omega_k > {ok:.4g} with the other parameters of the cosmology section" if np.isfinite(ok)
                else "")
        return (evidence + f"the {row['space']} has chi/R < {row['chi_over_r_max']:.4f} (its curvature radius "
                f"exceeds {row['size_chi']:.3f} chi){tail}.{physics}")
    return (evidence + f"the {row['space']} is larger than {row['size_chi']:.3f} chi = {row['size_gpc']:.1f} Gpc "
            f"(chi = {row['chi_gpc']:.2f} Gpc).{physics}")


def bound_row(recovery: Table, level, false_alarm, sig, radius_tol, d1, chi_gpc, space, point_fraction=False,
              n_sims=0, physics="", geometry="flat", cosmo=None):
    """The bound's values. ``sig``: significant rows (radius, flip, p_global, S) of :func:`significant_rows`."""
    col = "fraction" if point_fraction else "lower_95"
    n = np.asarray(recovery["n"], int)
    measure = (np.asarray(recovery["fraction"], float) if point_fraction else
               np.asarray(lower_limit(np.asarray(recovery["detected"], int), n), float))
    a = alpha_min(recovery["radius_deg"], measure, level, [r for r, *_ in sig], radius_tol)
    if sig:
        a = float("nan")
    k_max = ok_min = float("nan")
    if geometry == "spherical":            # size = R / chi: spaces with a smaller curvature radius are excluded
        if np.isfinite(a):
            k_max, ok_min = spherical_limits(a, d1, cosmo)
        size = 1.0 / k_max if np.isfinite(k_max) else float("nan")
    else:
        size = size_bound(a, d1) if np.isfinite(a) else float("nan")
    n_at = int(n[np.argmin(np.abs(np.asarray(recovery["radius_deg"], float) - a))]) if np.isfinite(a) else 0
    det = "; ".join(f"radius {r:.1f} deg, flip {str(f).lower()}, S_grid {sv:.3f}, p_global {p:.3g}"
                    for r, f, p, sv in sorted(sig, key=lambda x: x[2])[:5])
    return dict(space=space, alpha_min_deg=a, size_chi=size, size_gpc=size * chi_gpc, chi_gpc=float(chi_gpc),
                recovery_level=float(level), recovery_measure=col, false_alarm=float(false_alarm),
                n_significant=len(sig), n_sims=int(n_sims), n_at_alpha=n_at, n_max=int(n.max()) if n.size else 0,
                n_needed=all_recovered_needed(level) if level < 1 else 0, detections=det, physics=physics,
                geometry=geometry, chi_over_r_max=k_max, omega_k_min=ok_min,
                distance_per_size=float(d1), radius_max_deg=float(np.max(recovery["radius_deg"])) if len(recovery)
                else float("nan"))


def bound_table(row) -> Table:
    names = ["space", "alpha_min_deg", "size_chi", "size_gpc", "chi_gpc", "recovery_level", "recovery_measure",
             "n_at_alpha", "false_alarm", "n_sims", "n_significant", "distance_per_size", "radius_max_deg",
             "statement"]
    t = Table(rows=[[row[n] for n in names[:-1]] + [statement(row)]], names=names,
              dtype=[str, float, float, float, float, float, str, int, float, int, int, float, float, str])
    for c, u in (("alpha_min_deg", "deg"), ("size_gpc", "Gpc"), ("chi_gpc", "Gpc"), ("radius_max_deg", "deg")):
        t[c].unit = u
    for c in ("alpha_min_deg", "size_chi", "size_gpc", "chi_gpc"):
        t[c].info.format = ".4f"
    return t


def chi_for(cfg) -> float:
    if cfg.bound.chi_gpc:
        return float(cfg.bound.chi_gpc)
    from .cosmology import chi_ls_gpc

    return float(chi_ls_gpc(cfg.cosmology))


def bound_run(cfg, run):
    """The bound stage on an open run: bound.ecsv and its sentence. Returns summary lines."""
    from .inject import RECOVERY
    from .results import provenance, read_table, write_table

    rec_path = run.dir / RECOVERY
    if not rec_path.exists():
        raise InputError(f"{rec_path}: recovery table not found; allowed: run `twinring inject` first")
    rec = read_table(rec_path, "recovery table")
    tables = []
    for name in ("candidates.ecsv", "peaks.ecsv"):
        p = run.dir / name
        if p.exists():
            t = read_table(p, name)
            if "p_global" not in t.colnames:
                raise InputError(f"{p}: no p_global column; allowed: a search calibrated by `twinring calibrate`")
            tables.append(t)
    if not tables:
        raise InputError(f"{run.dir}: no candidates.ecsv; allowed: run `twinring search` and `twinring calibrate` first")
    level = cfg.bound.false_alarm if cfg.bound.false_alarm is not None else cfg.calibrate.significance
    n_sims = int(tables[0].meta.get("calibration_n_sims", 0))
    # physical pairs are the candidates; per-radius peaks only stand in when there are no candidates
    sig = significant_rows(tables[:1], level, n_sims)
    d1 = float(rec.meta.get("distance_per_size", 1.0))
    physics = str(rec.meta.get("physics_label", rec.meta.get("physics", "")))
    geometry = str(rec.meta.get("geometry", "flat"))
    row = bound_row(rec, cfg.bound.recovery, level, sig, cfg.inject.radius_tol_deg, d1,
                    chi_for(cfg), space_name(rec.meta), cfg.bound.point_fraction, n_sims, physics,
                    geometry=geometry, cosmo=cfg.cosmology)
    t = bound_table(row)
    meta = provenance(cfg, None, "bound")
    meta.update(rule="alpha_min: smallest campaign radius whose recovery measure (recovery_measure) >= level there "
                     "and at every larger radius, and no candidate with p_global <= false_alarm (resolved by the "
                     "calibration's simulations); flat: size > 2 chi cos(alpha_min) / distance_per_size; spherical: "
                     "chi/R < arctan(tan(d1/2) / cos(alpha_min)), size = R/chi",
                injection_physics=physics)
    write_table(t, run.dir / BOUND, meta)
    return [t["statement"][0]]


def cmd_bound(args):
    from .rundir import open_run
    from .inputs import load_run_config

    cfg = load_run_config(args)
    run = open_run(cfg, args.out, args.force, "bound")
    run.finish(bound_run(cfg, run))
    return 0
