"""Figures and a short summary of a run directory.

``twinring report DIR`` reads what the stages left in DIR and draws, for
whatever is there:

* ``fig_peaks.png``: the data's grid peak S against radius, one panel per
  sense, over the simulations' distribution (median, 68 % and 95 % bands) and
  the calibrated thresholds (local: dashed, global: solid) at each false-alarm
  rate (peaks.ecsv, null_peaks.ecsv, thresholds.ecsv);
* ``fig_map.png``: the prepared map in Mollweide projection, masked pixels grey,
  with the circles of the top candidates drawn (prepared.fits, candidates.ecsv);
* ``fig_recovery.png``: the recovered fraction of injected skies against
  radius with its binomial interval, the recovery level and alpha_min
  (recovery.ecsv, bound.ecsv);
* ``fig_null.png``: the simulations' global maxima z with the extreme-value
  fit and the data's most significant value, and the same for the local maxima
  at that radius and sense (null_peaks.ecsv, peaks.ecsv);

plus ``summary.md`` and ``summary.json`` with the headline result.
"""
from __future__ import annotations

import json
import math
import warnings
from pathlib import Path

import numpy as np

from .config import InputError

FIGURES = ("fig_peaks.png", "fig_map.png", "fig_recovery.png", "fig_null.png")
SENSE_LABEL = {False: "flip = false (circle 2 same sense)", True: "flip = true (opposite senses)"}


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _read(run_dir, name):
    from .results import read_table

    p = Path(run_dir) / name
    return read_table(p, name) if p.exists() else None


def _save(fig, path, dpi):
    from .results import atomic_path

    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=dpi, format="png", bbox_inches="tight")
    _plt().close(fig)
    return Path(path)


# --------------------------------------------------------------------------- figures
def fig_peaks(peaks, model, thresholds, path, dpi=110):
    """Data grid peaks against radius over the simulations' bands and thresholds, per sense."""
    plt = _plt()
    fig, axes = plt.subplots(1, 2, figsize=(11, 4.2), sharey=True)
    rates = sorted(set(float(a) for a in thresholds["false_alarm"])) if thresholds is not None else []
    colors = ["C3", "C1", "C4", "C5"]
    for ax, flip in zip(axes, (False, True)):
        f = int(flip)
        if model is not None:
            r = model.radii
            P = model.peaks[:, :, f]
            q = np.nanpercentile(P, [2.5, 16, 50, 84, 97.5], axis=0)
            ax.fill_between(r, q[0], q[4], color="0.85", label="simulations 95 %")
            ax.fill_between(r, q[1], q[3], color="0.7", label="simulations 68 %")
            ax.plot(r, q[2], color="0.4", lw=1, label="simulations median")
        for a, col in zip(rates, colors):
            sel = (thresholds["flip"] == flip) & np.isclose(thresholds["false_alarm"], a)
            t = thresholds[sel]
            ax.plot(t["radius_deg"], t["s_threshold"], ls="--", color=col, lw=1.2, label=f"local {a:g}")
            ax.plot(t["radius_deg"], t["s_threshold_global"], ls="-", color=col, lw=1.2, label=f"global {a:g}")
        if peaks is not None:
            d = peaks[peaks["flip"] == flip]
            ax.plot(d["radius_deg"], d["s"], "o-", color="k", ms=3, lw=1.2, label="data (grid peak)")
            if "p_global" in d.colnames and len(d):
                k = int(np.nanargmin(np.where(np.isfinite(d["p_global"]), d["p_global"], np.inf)))
                ax.annotate(f"p_global = {d['p_global'][k]:.2g}", (d["radius_deg"][k], d["s"][k]),
                            xytext=(10, -4), textcoords="offset points", fontsize=8)
        ax.set_title(SENSE_LABEL[flip], fontsize=10)
        ax.set_xlabel("circle radius [deg]")
        ax.grid(alpha=0.3)
    axes[0].set_ylabel("maximum S over pairs and twists")
    handles, labels = axes[1].get_legend_handles_labels()
    fig.legend(handles, labels, fontsize=8, loc="lower center", ncol=min(5, max(1, len(labels))), frameon=False,
               bbox_to_anchor=(0.5, -0.1))
    fig.suptitle("Matched-circle statistic: data against isotropic simulations (grid S)", fontsize=11)
    return _save(fig, path, dpi)


def fig_map(prepared, cand, path, n_circles=3, dpi=110, predicted=None):
    """The prepared map (Mollweide) with the top candidates' circles."""
    import healpy as hp

    from . import rings

    plt = _plt()
    m = np.array(prepared.map, dtype=float)
    if prepared.mask is not None:
        m[prepared.mask <= 0.5] = hp.UNSEEN
    good = m[m != hp.UNSEEN]
    lim = float(np.percentile(np.abs(good), 99)) if good.size else 1.0
    fig = plt.figure(figsize=(10, 5.6))
    hp.mollview(m, fig=fig.number, title="prepared map with the top candidate circles", unit="uK",
                min=-lim, max=lim, cmap="RdBu_r", badcolor="0.75", hold=True, format="%.0f")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        hp.graticule(dpar=30, dmer=60, alpha=0.3)
    colors = ["k", "C2", "C1", "C4", "C5", "C6", "C7", "C8", "C9"]
    handles = []
    if cand is not None:
        for k, row in enumerate(cand[:n_circles]):
            col = colors[k % len(colors)]
            alpha = math.radians(float(row["radius_deg"]))
            label = f"#{int(row['rank'])}: r = {row['radius_deg']:.1f} deg, S = {row['s']:.2f}"
            if "p_global" in cand.colnames:
                label += f", p_global = {row['p_global']:.2g}"
            for lon, lat, ls in ((row["lon1_deg"], row["lat1_deg"], "-"), (row["lon2_deg"], row["lat2_deg"], "--")):
                c = rings.lonlat_to_vec(float(lon), float(lat))
                pts = rings.ring_points(c, alpha, 721)[0]
                lo, la = rings.vec_to_lonlat(pts)
                hp.projplot(lo, la, lonlat=True, color=col, lw=1.6, ls=ls)
                hp.projscatter([float(lon)], [float(lat)], lonlat=True, color=col, marker="x", s=30)
            handles.append(plt.Line2D([], [], color=col, lw=1.6, label=label))
    if predicted is not None and len(predicted):
        r_top = float(np.max(predicted["radius_deg"]))
        shown = predicted[predicted["radius_deg"] >= r_top - 0.5]
        for row in shown:
            for lon, lat in ((row["lon1_deg"], row["lat1_deg"]), (row["lon2_deg"], row["lat2_deg"])):
                pts = rings.ring_points(rings.lonlat_to_vec(float(lon), float(lat)),
                                        math.radians(float(row["radius_deg"])), 721)[0]
                lo, la = rings.vec_to_lonlat(pts)
                hp.projplot(lo, la, lonlat=True, color="m", lw=0.9, ls=":")
        handles.append(plt.Line2D([], [], color="m", lw=0.9, ls=":",
                                  label=f"predicted (circles.ecsv): {len(shown)} pairs at {r_top:.1f} deg"))
    if handles:
        fig.legend(handles=handles, loc="lower center", fontsize=8, ncol=1, frameon=False,
                   bbox_to_anchor=(0.5, -0.02))
    return _save(fig, path, dpi)


def fig_recovery(rec, bound_row, path, level=0.95, dpi=110):
    """Recovered fraction against radius with binomial intervals, the recovery level and alpha_min."""
    plt = _plt()
    fig, ax = plt.subplots(figsize=(7, 4.2))
    r = np.asarray(rec["radius_deg"], float)
    f = np.asarray(rec["fraction"], float)
    lo = np.asarray(rec["ci_low"], float)
    hi = np.asarray(rec["ci_high"], float)
    ax.errorbar(r, f, yerr=[np.clip(f - lo, 0, None), np.clip(hi - f, 0, None)], fmt="o-", color="C0",
                capsize=3, label="recovered fraction (95 % Clopper-Pearson)")
    ax.axhline(level, color="C3", ls=":", lw=1, label=f"recovery level {level:.0%}")
    if bound_row is not None and np.isfinite(bound_row["alpha_min_deg"]):
        ax.axvline(bound_row["alpha_min_deg"], color="C2", ls="--", lw=1.2,
                   label=f"alpha_min = {bound_row['alpha_min_deg']:.1f} deg")
    ax.set_xlabel("radius of the largest circles [deg]")
    ax.set_ylabel("fraction of injected skies recovered")
    ax.set_ylim(-0.03, 1.08)
    ax.grid(alpha=0.3)
    d1 = float(rec.meta.get("distance_per_size", 1.0))
    sec = ax.secondary_xaxis("top", functions=(
        lambda a: 2.0 * np.cos(np.radians(np.clip(a, 0.0, 90.0))) / d1,
        lambda L: np.degrees(np.arccos(np.clip(np.asarray(L) * d1 / 2.0, 0.0, 1.0)))))
    sec.set_xlabel("size of space [chi]", fontsize=8)
    sec.tick_params(labelsize=8)
    ax.legend(fontsize=8, loc="upper left")
    title = "Injection-recovery"
    if "space" in rec.meta:
        title += f": {rec.meta['space']}, {rec.meta.get('mode', '')} search, {rec.meta.get('threshold', '')} " \
                 f"threshold at {rec.meta.get('false_alarm', '')}"
    ax.set_title(title, fontsize=10, pad=28)
    return _save(fig, path, dpi)


def fig_null(model, peaks, path, dpi=110):
    """The simulations' maxima with the extreme-value fits, and the data's value."""
    plt = _plt()
    fig, axes = plt.subplots(1, 2, figsize=(11, 4.2))
    ax = axes[0]
    z = model.zmax[np.isfinite(model.zmax)]
    ax.hist(z, bins=max(8, int(np.sqrt(z.size)) + 2), density=True, color="0.75", edgecolor="0.5",
            label=f"{z.size} simulations")
    fit = model.global_fit
    best = None
    if peaks is not None and "z" in peaks.colnames and len(peaks):
        zz = np.asarray(peaks["z"], float)
        k = int(np.nanargmax(np.where(np.isfinite(zz), zz, -np.inf)))
        best = peaks[k]
    lo = min(z.min(), best["z"] if best is not None else z.min()) - 0.5
    hi = max(z.max(), best["z"] if best is not None else z.max()) + 0.5
    x = np.linspace(lo, hi, 300)
    if fit.params:
        ax.plot(x, fit.pdf(x), color="C0", label=f"{fit.kind} fit (KS p = {fit.ks_p:.2f})")
    if best is not None:
        ax.axvline(best["z"], color="C3", lw=1.5, label=f"data: z = {best['z']:.2f}, p_global = {best['p_global']:.2g}")
    ax.set_xlabel("global statistic Z = max over radii and senses of (S - mean) / std")
    ax.set_ylabel("density")
    ax.legend(fontsize=8, loc="upper left")
    ax.set_title("look-elsewhere: maxima over all radii and senses", fontsize=10)
    ax = axes[1]
    if best is not None:
        ir, f = model.radius_index(best["radius_deg"]), int(bool(best["flip"]))
    else:
        ir, f = 0, 0
    P = model.peaks[:, ir, f]
    P = P[np.isfinite(P)]
    ax.hist(P, bins=max(8, int(np.sqrt(P.size)) + 2), density=True, color="0.75", edgecolor="0.5",
            label=f"{P.size} simulations")
    lf = model.local_fits[ir][f]
    s_data = float(best["s"]) if best is not None else None
    lo = min(P.min(), s_data if s_data is not None else P.min()) - 0.03
    hi = max(P.max(), s_data if s_data is not None else P.max()) + 0.03
    x = np.linspace(lo, hi, 300)
    if lf.params:
        ax.plot(x, lf.pdf(x), color="C0", label=f"{lf.kind} fit (KS p = {lf.ks_p:.2f})")
    if s_data is not None:
        ax.axvline(s_data, color="C3", lw=1.5, label=f"data: S = {s_data:.3f}, p_local = {best['p_local']:.2g}")
    ax.set_xlabel("maximum S at one radius and sense")
    ax.set_title(f"radius {model.radii[ir]:g} deg, {'flip = true' if f else 'flip = false'}", fontsize=10)
    ax.legend(fontsize=8, loc="upper right")
    return _save(fig, path, dpi)


# --------------------------------------------------------------------------- summary
def _row_dict(row, cols):
    out = {}
    for c in cols:
        if c in row.colnames:
            v = row[c]
            if isinstance(v, (np.bool_, bool)):
                out[c] = bool(v)
            elif isinstance(v, (np.integer,)):
                out[c] = int(v)
            elif isinstance(v, (np.floating, float)):
                out[c] = None if not np.isfinite(v) else float(f"{float(v):.6g}")
            else:
                out[c] = str(v)
    return out


CAND_COLS = ("rank", "radius_deg", "lon1_deg", "lat1_deg", "lon2_deg", "lat2_deg", "separation_deg", "twist_deg",
             "flip", "s", "s_grid", "z", "p_local", "p_global", "p_global_method")


def summarize(run_dir, cfg=None, figures=()):
    """The headline result of a run directory as a dict."""
    from .calibrate import best_global

    d = Path(run_dir)
    out = {"run_dir": str(d.resolve()), "figures": [str(f) for f in figures]}
    if cfg is not None:
        out["config_hash"] = cfg.hash()
        out["search"] = {"family": cfg.search.family, "radius_deg": list(cfg.search.radius_deg),
                         "nside_centers": cfg.search.nside_centers, "weighting": cfg.search.weighting}
    cand = _read(d, "candidates.ecsv")
    peaks = _read(d, "peaks.ecsv")
    thr = _read(d, "thresholds.ecsv")
    rec = _read(d, "recovery.ecsv")
    bnd = _read(d, "bound.ecsv")
    if cand is not None and len(cand):
        out["best_candidate"] = _row_dict(cand[0], CAND_COLS)
        if "p_global" in cand.colnames:
            out["most_significant_candidate"] = _row_dict(best_global(cand), CAND_COLS)
    if peaks is not None and "p_global" in peaks.colnames and len(peaks):
        out["most_significant_peak"] = _row_dict(best_global(peaks), ("radius_deg", "flip", "s", "z", "p_local",
                                                                     "p_global", "p_global_method"))
    if thr is not None:
        meta = thr.meta
        out["calibration"] = {"n_sims": meta.get("n_sims"), "spectrum": meta.get("spectrum"),
                              "tail": meta.get("tail"), "global_fit_ks_p": meta.get("global_fit_ks_p"),
                              "local_fit_ks_p_median": meta.get("local_fit_ks_p_median")}
        rows = []
        for row in thr:
            rows.append(_row_dict(row, ("radius_deg", "flip", "false_alarm", "s_threshold", "s_threshold_global",
                                        "method")))
        out["calibration"]["thresholds"] = rows
    if rec is not None:
        out["recovery"] = [_row_dict(r, ("size_chi", "radius_deg", "n", "detected", "fraction", "ci_low", "ci_high"))
                           for r in rec]
        out["recovery_setup"] = {k: rec.meta.get(k) for k in ("space", "mode", "threshold", "false_alarm",
                                                               "realizations", "noise_uk_arcmin")}
    if bnd is not None and len(bnd):
        out["bound"] = _row_dict(bnd[0], ("space", "alpha_min_deg", "size_chi", "size_gpc", "chi_gpc",
                                          "recovery_level", "false_alarm", "n_significant", "statement"))
    out["headline"] = headline(out)
    return out


def headline(s) -> str:
    if "bound" in s:
        return s["bound"]["statement"]
    sig = s.get("most_significant_peak") or s.get("most_significant_candidate")
    if sig is not None and sig.get("p_global") is not None:
        p = sig["p_global"]
        verdict = "significant" if p < 0.01 else "consistent with an isotropic sky"
        n = s.get("calibration", {}).get("n_sims")
        method = sig.get("p_global_method")
        how = (f"{n} simulations" if method in (None, "empirical") else
               f"the {method} tail fitted to {n} simulations, beyond all of them")
        return (f"Most significant circle pair: S = {sig['s']:.3f} at radius {sig['radius_deg']:.1f} deg, "
                f"flip {str(sig['flip']).lower()}: p_global = {p:.2g} from {how} ({verdict}).")
    b = s.get("best_candidate")
    if b is not None:
        return (f"Best circle pair: S = {b['s']:.3f} at radius {b['radius_deg']:.1f} deg (not calibrated: "
                "run `twinring calibrate` for p-values).")
    return "No search results in this directory."


def summary_markdown(s) -> str:
    lines = ["# twinring run summary", "", f"**{s['headline']}**", ""]
    if "search" in s:
        q = s["search"]
        lines += [f"- search: {q['family']} pairs, radii {q['radius_deg'][0]:g}-{q['radius_deg'][1]:g} deg step "
                  f"{q['radius_deg'][2]:g}, centre grid nside {q['nside_centers']}, weighting {q['weighting']}"]
    if "calibration" in s:
        c = s["calibration"]
        lines += [f"- calibration: {c['n_sims']} isotropic Gaussian simulations (spectrum {c['spectrum']}), "
                  f"{c['tail']} tail, KS p of the global fit {_fmt(c['global_fit_ks_p'])}"]
    for key, title in (("best_candidate", "largest S"), ("most_significant_candidate", "most significant candidate")):
        if key in s:
            b = s[key]
            extra = f", p_local {_fmt(b.get('p_local'))}, p_global {_fmt(b.get('p_global'))}" if "p_global" in b else ""
            lines += [f"- {title}: S = {b['s']:.3f} (grid {b.get('s_grid', float('nan')):.3f}) at radius "
                      f"{b['radius_deg']:.2f} deg, centres ({b['lon1_deg']:.1f}, {b['lat1_deg']:.1f}) and "
                      f"({b['lon2_deg']:.1f}, {b['lat2_deg']:.1f}), twist {b['twist_deg']:.1f} deg, "
                      f"flip {str(b['flip']).lower()}{extra}"]
    if "recovery" in s:
        lines += ["", "| radius [deg] | size [chi] | recovered | 95 % interval |", "|---|---|---|---|"]
        for r in s["recovery"]:
            lines.append(f"| {r['radius_deg']:.1f} | {r['size_chi']:.3f} | {r['detected']}/{r['n']} | "
                         f"{_fmt(r['ci_low'])}-{_fmt(r['ci_high'])} |")
    if s.get("figures"):
        lines += ["", "## Figures", ""]
        for f in s["figures"]:
            lines.append(f"![{Path(f).stem}]({Path(f).name})")
    return "\n".join(lines) + "\n"


def _fmt(v):
    if v is None:
        return "n/a"
    if isinstance(v, float):
        return f"{v:.3g}"
    return str(v)


# --------------------------------------------------------------------------- the stage
def run_config(run_dir):
    """The resolved config stored in a run directory (None when absent or unreadable)."""
    from .config import config_from_dict
    from .rundir import CONFIG_NAME, read_yaml

    p = Path(run_dir) / CONFIG_NAME
    if not p.exists():
        return None
    try:
        return config_from_dict(read_yaml(p), source=str(p))
    except (InputError, Exception):
        return None


def make_report(run_dir, cfg=None, log=None):
    """Draw every figure the directory's contents allow, write summary.md / summary.json. Returns the summary."""
    from .calibrate import load_null_model
    from .exclude import exclusion_figures
    from .prepare import PREPARED_MAP, read_prepared
    from .results import write_text

    d = Path(run_dir)
    if not d.is_dir():
        raise InputError(f"{d}: run directory not found; allowed: a directory written by twinring")
    cfg = cfg or run_config(d)
    dpi = cfg.report.dpi if cfg is not None else 110
    n_circles = cfg.report.circles if cfg is not None else 3
    level = cfg.bound.recovery if cfg is not None else 0.95
    say = log or (lambda msg: None)
    figures = []
    peaks, cand = _read(d, "peaks.ecsv"), _read(d, "candidates.ecsv")
    thr, rec, bnd = _read(d, "thresholds.ecsv"), _read(d, "recovery.ecsv"), _read(d, "bound.ecsv")
    model = load_null_model(d) if (d / "null_peaks.ecsv").exists() else None
    if peaks is not None or model is not None:
        figures.append(fig_peaks(peaks, model, thr, d / FIGURES[0], dpi))
    if (d / PREPARED_MAP).exists():
        figures.append(fig_map(read_prepared(d), cand, d / FIGURES[1], n_circles, dpi, _read(d, "circles.ecsv")))
    if rec is not None and len(rec):
        figures.append(fig_recovery(rec, bnd[0] if bnd is not None and len(bnd) else None, d / FIGURES[2], level, dpi))
    if model is not None:
        figures.append(fig_null(model, peaks if peaks is not None and "z" in peaks.colnames else None,
                                d / FIGURES[3], dpi))
    figures += exclusion_figures(d, dpi)
    for f in figures:
        say(f"figure {f}")
    s = summarize(d, cfg, figures)
    write_text(d / "summary.json", json.dumps(s, indent=2, default=str) + "\n")
    write_text(d / "summary.md", summary_markdown(s))
    return s


def cmd_report(args):
    import time

    d = Path(args.dir)
    t0 = time.time()
    s = make_report(d)
    for f in s["figures"]:
        print(f"figure: {f}")
    print(s["headline"])
    print(f"summary: {d / 'summary.md'}, {d / 'summary.json'} ({time.time() - t0:.1f} s)")
    return 0
