"""Several maps of one sky (``map.paths``): the same search on each, and the top candidates matched across them.

With ``map.paths`` every map (for example the component-separation methods of one mission) is prepared,
searched and calibrated exactly as a single ``map.path`` would be, each in its own run directory
``maps/<name>/`` (``<name>``: the file name without ``.fits``/``.gz``, other characters than letters and
digits turned into ``_``).  This module then writes ``consistency.ecsv`` at the run's top level.

Matching (:func:`match_tables`, pure)
    The first ``consistency.top`` rows of every map's ``candidates.ecsv`` (its ranking: p_global after
    calibration, grid S before) are the references, taken best first (smallest p_global, then largest
    S_grid).  A reference is looked up in every other map among *all* its candidates: a candidate matches
    when it has the same sense (flip), a radius within ``radius_tol_deg`` and both centres within
    ``centre_tol_deg`` in either order (c1-c1' and c2-c2', or c1-c2' and c2-c1').  The best ranked match is
    taken; a candidate already taken by an earlier row is not used again, and a reference already taken
    is not a new row.  Default tolerances come from the grid: ``centre_steps`` (2) times the centre grid's
    resolution (``healpy.nside2resol(search.nside_centers)``) and one radius step.

Table (wide format: one row per matched circle pair)
    ``pair``, ``ref_map`` (the map whose top candidate opened the row), ``radius_deg``, ``flip`` and the
    centres of that reference, ``n_maps_found`` and ``n_maps_significant``; then per map, suffixed by its
    name: ``found_<name>``, ``rank_<name>`` (0: not found), ``s_grid_<name>``, ``p_local_<name>``,
    ``p_global_<name>`` (NaN: not found, or not calibrated) and ``significant_<name>`` (false when not found
    or not calibrated).  The metadata holds every map's path, sha256, unit, frame, field and N.
"""
from __future__ import annotations

import dataclasses
import re
from pathlib import Path

import numpy as np
from astropy.table import Table

from . import rings
from .config import InputError

CONSISTENCY = "consistency.ecsv"
MAPS_DIR = "maps"


# --------------------------------------------------------------------------- the maps of a config
def map_name(path) -> str:
    """A map's name in directory and column names: the file name without .fits/.fit/.gz, [A-Za-z0-9_] only."""
    name = Path(str(path)).name
    for ext in (".gz", ".fits", ".fit", ".fts"):
        if name.lower().endswith(ext):
            name = name[: -len(ext)]
    return re.sub(r"[^A-Za-z0-9]+", "_", name).strip("_") or "map"


def map_list(cfg) -> list:
    """``[(name, path)]`` of ``map.paths`` (globs expanded, every file existing, names distinct); [] for one map."""
    if not cfg.map.paths:
        return []
    from .calibrate import expand_paths

    paths = expand_paths(cfg.map.paths, "map.paths")
    if not paths:
        raise InputError(f"{cfg.source}: map.paths: found no file; allowed: a list or glob of HEALPix FITS maps")
    out, seen = [], {}
    for p in paths:
        n = map_name(p)
        if n in seen:
            raise InputError(f"{cfg.source}: map.paths: {seen[n]} and {p} have the same name '{n}'; allowed: maps "
                             "with distinct file names (each gets maps/<name>/ and columns suffixed _<name>)")
        seen[n] = p
        out.append((n, str(p)))
    return out


def map_config(cfg, path):
    """The config of one of several maps: ``map.path`` set to it, ``map.paths`` cleared, all else alike."""
    return dataclasses.replace(cfg, map=dataclasses.replace(cfg.map, path=str(path), paths=None))


def map_dir(run_dir, name) -> Path:
    return Path(run_dir) / MAPS_DIR / name


def tolerances(cfg) -> tuple:
    """(top, centre_tol_deg, radius_tol_deg, how they were chosen) from ``consistency`` or the grid."""
    from .search import centre_spacing_deg

    c = cfg.consistency
    top = c.top if c.top is not None else max(1, cfg.report.circles)
    step = float(centre_spacing_deg(cfg.search.nside_centers))
    ctol = c.centre_tol_deg if c.centre_tol_deg is not None else c.centre_steps * step
    rtol = c.radius_tol_deg if c.radius_tol_deg is not None else float(cfg.search.radius_deg[2])
    how = (("consistency.centre_tol_deg" if c.centre_tol_deg is not None else
            f"{c.centre_steps:g} x centre-grid step {step:.3f} deg (nside_centers {cfg.search.nside_centers})")
           + "; " + ("consistency.radius_tol_deg" if c.radius_tol_deg is not None else "one radius step"))
    return int(top), float(ctol), float(rtol), how


# --------------------------------------------------------------------------- pure matching
def _vec(lon_deg, lat_deg):
    return rings.lonlat_to_vec(np.asarray(lon_deg, float), np.asarray(lat_deg, float))


def _col(t, name, default=np.nan, dtype=float):
    return np.asarray(t[name], dtype) if name in t.colnames else np.full(len(t), default, dtype)


def _arrays(t):
    return {"c1": _vec(t["lon1_deg"], t["lat1_deg"]).reshape(-1, 3), "c2": _vec(t["lon2_deg"], t["lat2_deg"]).reshape(-1, 3),
            "r": _col(t, "radius_deg"), "flip": _col(t, "flip", False, bool),
            "s_grid": _col(t, "s_grid"), "p_local": _col(t, "p_local"), "p_global": _col(t, "p_global"),
            "significant": _col(t, "significant", False, bool),
            "rank": _col(t, "rank", 0, int) if "rank" in t.colnames else np.arange(1, len(t) + 1)}


def matches(a, i, b, centre_tol_deg, radius_tol_deg) -> np.ndarray:
    """Indices of rows of ``b`` matching row ``i`` of ``a`` (same sense, radius and centres in either order)."""
    if not len(b["r"]):
        return np.zeros(0, int)
    eps = 1e-9
    ok = (b["flip"] == a["flip"][i]) & (np.abs(b["r"] - a["r"][i]) <= radius_tol_deg + eps)
    same = (rings.separation_deg(a["c1"][i], b["c1"]) <= centre_tol_deg + eps) & (rings.separation_deg(a["c2"][i], b["c2"]) <= centre_tol_deg + eps)
    swap = (rings.separation_deg(a["c1"][i], b["c2"]) <= centre_tol_deg + eps) & (rings.separation_deg(a["c2"][i], b["c1"]) <= centre_tol_deg + eps)
    return np.flatnonzero(ok & (same | swap))


def match_tables(tables: dict, top: int, centre_tol_deg: float, radius_tol_deg: float) -> Table:
    """The consistency table of ranked candidate tables ``{name: Table}`` (see the module docstring)."""
    names = list(tables)
    arr = {n: _arrays(tables[n]) for n in names}
    refs = [(n, i) for n in names for i in range(min(top, len(tables[n])))]
    key = [(np.nan_to_num(arr[n]["p_global"][i], nan=np.inf), -np.nan_to_num(arr[n]["s_grid"][i], nan=-np.inf),
            names.index(n), i) for n, i in refs]
    refs = [refs[k] for k in sorted(range(len(refs)), key=lambda k: key[k])]
    taken = {n: set() for n in names}
    rows = []
    for n, i in refs:
        if i in taken[n]:
            continue
        hit = {n: i}
        for m in names:
            if m == n:
                continue
            js = [j for j in matches(arr[n], i, arr[m], centre_tol_deg, radius_tol_deg) if j not in taken[m]]
            if js:
                hit[m] = min(js, key=lambda j: (arr[m]["rank"][j], j))
        for m, j in hit.items():
            taken[m].add(j)
        rows.append((n, i, hit))
    t = Table()
    t["pair"] = np.arange(1, len(rows) + 1, dtype=int)
    t["ref_map"] = np.array([n for n, _, _ in rows], dtype=str) if rows else np.zeros(0, "U1")
    lon1, lat1, lon2, lat2 = (np.array([float(tables[n][c][i]) for n, i, _ in rows])
                              for c in ("lon1_deg", "lat1_deg", "lon2_deg", "lat2_deg"))
    t["radius_deg"] = np.array([arr[n]["r"][i] for n, i, _ in rows], float)
    t["flip"] = np.array([arr[n]["flip"][i] for n, i, _ in rows], bool)
    t["lon1_deg"], t["lat1_deg"], t["lon2_deg"], t["lat2_deg"] = lon1, lat1, lon2, lat2
    t["n_maps_found"] = np.array([len(h) for _, _, h in rows], int)
    t["n_maps_significant"] = np.array([sum(bool(arr[m]["significant"][j]) for m, j in h.items()) for _, _, h in rows],
                                       int)
    for m in names:
        a = arr[m]
        js = [h.get(m) for _, _, h in rows]
        t[f"found_{m}"] = np.array([j is not None for j in js], bool)
        t[f"rank_{m}"] = np.array([int(a["rank"][j]) if j is not None else 0 for j in js], int)
        for c in ("s_grid", "p_local", "p_global"):
            t[f"{c}_{m}"] = np.array([a[c][j] if j is not None else np.nan for j in js], float)
        t[f"significant_{m}"] = np.array([bool(a["significant"][j]) if j is not None else False for j in js], bool)
    if len(t):
        best_p = np.nanmin(np.vstack([np.nan_to_num(np.asarray(t[f"p_global_{m}"]), nan=np.inf) for m in names]), 0)
        best_s = np.max(np.vstack([np.nan_to_num(np.asarray(t[f"s_grid_{m}"]), nan=-np.inf) for m in names]), 0)
        order = np.lexsort((-best_s, best_p, -np.asarray(t["n_maps_found"]), -np.asarray(t["n_maps_significant"])))
        t = t[order]
        t["pair"] = np.arange(1, len(t) + 1, dtype=int)
    for c in t.colnames:
        if t[c].dtype.kind == "f":
            t[c].info.format = ".6g"
    return t


# --------------------------------------------------------------------------- the edge
def write_consistency(cfg, run_dir, log=None) -> list:
    """Read every map's candidates.ecsv under ``maps/<name>/``, write ``consistency.ecsv``; summary lines."""
    from .results import provenance, read_table, write_table
    from .skymap import input_provenance

    maps = map_list(cfg)
    top, ctol, rtol, how = tolerances(cfg)
    tables, meta_maps = {}, {}
    for name, path in maps:
        p = map_dir(run_dir, name) / "candidates.ecsv"
        tables[name] = read_table(p, f"candidates of map {name}")
        tm = tables[name].meta
        d = {"path": path}
        d.update({k[len("map_"):]: v for k, v in input_provenance(map_config(cfg, path).map).items()})
        d["n_sims"] = tm.get("calibration_n_sims")
        d["significance_level"] = tm.get("significance_level")
        d["significance_resolved"] = tm.get("significance_resolved")
        meta_maps[name] = d
    t = match_tables(tables, top, ctol, rtol)
    meta = provenance(cfg, {f"map_{n}": p for n, p in maps}, "consistency")
    meta.update(maps=[n for n, _ in maps], top=top, centre_tol_deg=ctol, radius_tol_deg=rtol, tolerance_from=how,
                table_format="wide: one row per matched circle pair, per-map columns suffixed _<map name>",
                matching="same sense, radius within radius_tol_deg, both centres within centre_tol_deg in either order")
    for n, d in meta_maps.items():
        meta.update({f"map_{n}_{k}": ("" if v is None else v) for k, v in d.items()})
    write_table(t, Path(run_dir) / CONSISTENCY, meta)
    lines = [f"consistency.ecsv: {len(t)} circle pairs from the top {top} of {len(maps)} maps, matched within "
             f"{ctol:.2f} deg (centres) and {rtol:g} deg (radius)"]
    both = int(np.sum(np.asarray(t["n_maps_found"]) == len(maps))) if len(t) else 0
    lines.append(f"{both} found in every map; " + (
        f"{int(np.sum(np.asarray(t['n_maps_significant']) == len(maps)))} significant in every map"
        if len(t) else "none significant"))
    if log is not None:
        for line in lines:
            log(line)
    return lines


def summary(run_dir) -> dict | None:
    """What the report shows of a consistency.ecsv (None when the run has none)."""
    from .results import read_table

    p = Path(run_dir) / CONSISTENCY
    if not p.exists():
        return None
    t = read_table(p, CONSISTENCY)
    names = list(t.meta.get("maps", []))
    rows = []
    for r in t:
        rows.append({"pair": int(r["pair"]), "radius_deg": float(r["radius_deg"]), "flip": bool(r["flip"]),
                     "centres": [float(r[c]) for c in ("lon1_deg", "lat1_deg", "lon2_deg", "lat2_deg")],
                     "n_maps_found": int(r["n_maps_found"]), "n_maps_significant": int(r["n_maps_significant"]),
                     "maps": {n: {"s_grid": float(r[f"s_grid_{n}"]), "p_global": float(r[f"p_global_{n}"]),
                                  "significant": bool(r[f"significant_{n}"])} for n in names}})
    inputs = {n: {k: t.meta.get(f"map_{n}_{k}") for k in ("unit", "frame", "field", "ordering", "sha256", "n_sims")}
              for n in names}
    for n in names:
        inputs[n]["sha256"] = t.meta.get(f"sha256_map_{n}")
    return {"maps": names, "top": t.meta.get("top"), "centre_tol_deg": t.meta.get("centre_tol_deg"),
            "radius_tol_deg": t.meta.get("radius_tol_deg"), "rows": rows, "inputs": inputs}


# --------------------------------------------------------------------------- what the report shows
def headline(c) -> str:
    k = len(c["maps"])
    every = sum(r["n_maps_significant"] == k for r in c["rows"])
    some = sum(r["n_maps_significant"] > 0 for r in c["rows"])
    found = sum(r["n_maps_found"] == k for r in c["rows"])
    if every:
        return f"Matched circles significant in all {k} maps: {every} pair{'s' if every != 1 else ''}."
    if not any(i.get("n_sims") for i in c["inputs"].values()):
        return (f"Several maps ({k}), not calibrated: {found} of the {len(c['rows'])} top circle pairs found in every "
                "map (run `twinring calibrate` for p-values).")
    return (f"Several maps ({k}): no circle pair significant in every map ({some} significant in some map; "
            f"{found} of the {len(c['rows'])} top pairs found in every map).")


def markdown(c) -> list:
    """The several-map paragraph and table of summary.md."""
    names = c["maps"]
    lines = ["", "## Several maps", "",
             f"The same preparation, search and calibration ran on {len(names)} maps (each in maps/<name>/, with its "
             f"own summary). The top {c['top']} candidates of every map were matched across the maps (same sense, "
             f"radius within {c['radius_tol_deg']:g} deg, centres within {c['centre_tol_deg']:.2f} deg in either "
             "order); consistency.ecsv has every row. A pair seen in one map only is a property of that map "
             "(its noise or foreground residuals), not of the sky.", ""]
    for n in names:
        i = c["inputs"][n]
        lines.append(f"- {n}: unit {i['unit']}, frame {i['frame']}, field {i['field']}, ordering {i['ordering']}, "
                     f"N = {i['n_sims'] or 'not calibrated'}, sha256 {i['sha256']}")
    lines += ["", "| pair | radius [deg] | flip | found in | significant in | "
              + " | ".join(f"{n}: S_grid, p_global" for n in names) + " |",
              "|---" * (5 + len(names)) + "|"]
    for r in c["rows"]:
        cells = []
        for n in names:
            m = r["maps"][n]
            cells.append("—" if not np.isfinite(m["s_grid"]) else
                         f"{m['s_grid']:.3f}, " + (f"{m['p_global']:.3g}" if np.isfinite(m["p_global"]) else "n/a")
                         + (" *" if m["significant"] else ""))
        lines.append(f"| {r['pair']} | {r['radius_deg']:.1f} | {str(r['flip']).lower()} | {r['n_maps_found']} | "
                     f"{r['n_maps_significant']} | " + " | ".join(cells) + " |")
    lines.append("")
    lines.append("(* significant in that map; — not among that map's candidates)")
    return lines
