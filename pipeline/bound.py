"""From a non-detection to a lower bound on the size of space.

alpha_min is the smallest radius of the injection campaign such that

* at that radius and at every larger campaign radius, at least
  ``bound.recovery`` of the injected skies were recovered (recovery.ecsv; with
  ``bound.conservative`` the lower end of the 95 % binomial interval must reach
  that level, which needs many realisations: 72 of 72 for 95 %), and
* no candidate or peak of the data at a radius >= alpha_min - inject.radius_tol_deg
  has ``p_global`` below ``bound.false_alarm`` (candidates.ecsv, peaks.ecsv
  after calibration).

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

BOUND = "bound.ecsv"


def size_bound(alpha_min_deg, d1=1.0, chi=1.0):
    """Smallest size not excluded: 2 chi cos(alpha_min) / d1 (cubic torus: L > 2 chi cos alpha_min)."""
    return 2.0 * float(chi) * math.cos(math.radians(float(alpha_min_deg))) / float(d1)


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


def significant_radii(tables, false_alarm):
    """Radii of table rows with p_global < false_alarm (tables annotated by calibration)."""
    out = []
    for t in tables:
        if t is None or len(t) == 0:
            continue
        p = np.asarray(t["p_global"], float)
        out.extend(np.asarray(t["radius_deg"], float)[np.isfinite(p) & (p < false_alarm)].tolist())
    return out


def space_name(meta) -> str:
    from .topology.manifolds import TITLES

    name = str(meta.get("space", "E1"))
    title = TITLES.get(name, name)
    lengths = meta.get("shape_lengths") or []
    if name == "E1" and len(lengths) == 3 and np.allclose(lengths, lengths[0]):
        title = "cubic three-torus"
    return f"{title} ({name})"


def statement(row) -> str:
    """One sentence with the headline bound."""
    if not np.isfinite(row["alpha_min_deg"]):
        why = (f"a candidate with p_global < {row['false_alarm']:g} was found" if row["n_significant"] else
               f"no campaign radius reached {row['recovery_level']:.0%} recovery")
        return (f"No bound on the {row['space']}: {why} (largest campaign radius "
                f"{row['radius_max_deg']:.1f} deg).")
    how = "lower 95 % bound of the recovered fraction" if row.get("recovery_measure") == "ci_low" else \
        "injected skies recovered"
    return (f"No matched circles with radius above {row['alpha_min_deg']:.1f} deg "
            f"({how} >= {row['recovery_level']:.0%}, no candidate with p_global < "
            f"{row['false_alarm']:g}), so the {row['space']} is larger than {row['size_chi']:.3f} chi = "
            f"{row['size_gpc']:.1f} Gpc (chi = {row['chi_gpc']:.2f} Gpc).")


def bound_row(recovery: Table, level, false_alarm, sig, radius_tol, d1, chi_gpc, space, conservative=False):
    col = "ci_low" if conservative else "fraction"
    a = alpha_min(recovery["radius_deg"], recovery[col], level, sig, radius_tol)
    size = size_bound(a, d1) if np.isfinite(a) else float("nan")
    return dict(space=space, alpha_min_deg=a, size_chi=size, size_gpc=size * chi_gpc, chi_gpc=float(chi_gpc),
                recovery_level=float(level), recovery_measure=col, false_alarm=float(false_alarm),
                n_significant=len(sig),
                distance_per_size=float(d1), radius_max_deg=float(np.max(recovery["radius_deg"])) if len(recovery)
                else float("nan"))


def bound_table(row) -> Table:
    names = ["space", "alpha_min_deg", "size_chi", "size_gpc", "chi_gpc", "recovery_level", "recovery_measure",
             "false_alarm", "n_significant", "distance_per_size", "radius_max_deg", "statement"]
    t = Table(rows=[[row[n] for n in names[:-1]] + [statement(row)]], names=names,
              dtype=[str, float, float, float, float, float, str, float, int, float, float, str])
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
    sig = significant_radii(tables, cfg.bound.false_alarm)
    d1 = float(rec.meta.get("distance_per_size", 1.0))
    row = bound_row(rec, cfg.bound.recovery, cfg.bound.false_alarm, sig, cfg.inject.radius_tol_deg, d1,
                    chi_for(cfg), space_name(rec.meta), cfg.bound.conservative)
    t = bound_table(row)
    meta = provenance(cfg, None, "bound")
    meta.update(rule="alpha_min: smallest campaign radius with recovery >= level there and at every larger radius, "
                     "and no candidate with p_global < false_alarm at radius >= alpha_min - inject.radius_tol_deg; "
                     "size > 2 chi cos(alpha_min) / distance_per_size")
    write_table(t, run.dir / BOUND, meta)
    return [t["statement"][0]]


def cmd_bound(args):
    from .rundir import open_run
    from .stages import load_run_config

    cfg = load_run_config(args)
    run = open_run(cfg, args.out, args.force, "bound")
    run.finish(bound_run(cfg, run))
    return 0
