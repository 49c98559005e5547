"""Figures and a short summary of a run directory.

``twinring report DIR`` reads what the stages left in DIR and draws, for
whatever is there:

* ``fig_peaks.png``: the data's grid peak S against radius, one panel per
  sense, over the simulations' distribution (median, 68 % and 95 % bands) and
  the calibrated thresholds (local: dashed, global: solid) at each false-alarm
  rate; thresholds the simulations cannot resolve (``usable`` false in
  thresholds.ecsv) are drawn thin and grey (peaks.ecsv, null_peaks.ecsv,
  thresholds.ecsv);
* ``fig_map.png``: the prepared map in Mollweide projection (µK, its frame
  named), masked pixels grey, with the circles of the significant candidates
  (with none, the top ones of the ranking, labelled "not significant") and
  every predicted circle of a configured topology (prepared.fits,
  candidates.ecsv, circles.ecsv);
* ``fig_recovery.png``: the recovered fraction of injected skies against
  radius with its binomial interval, the recovery level and alpha_min
  (recovery.ecsv, bound.ecsv);
* ``fig_null.png``: the simulations' values as an empirical distribution, with
  any fitted extreme-value tail drawn apart as descriptive only, and the data's
  value (null_peaks.ecsv, peaks.ecsv, thresholds.ecsv);
* ``fig_candidate_N.png`` for each top candidate (rank N): its two ring
  profiles overlaid at the best twist and sense, as the S statistic compares
  them, and S against twist for both senses (prepared.fits, candidates.ecsv);

plus ``summary.md`` and ``summary.json`` with the headline result.

Significance is read, never computed, here: the columns ``p_local``,
``p_global`` (empirical, floored at 1/(N+1)), ``beyond_sims``,
``p_global_tail`` (descriptive) and ``significant`` written by the calibration,
and the row order of candidates.ecsv (the calibrated ranking).  No p-value is
printed below the floor 1/(N+1) of N simulations.
"""
from __future__ import annotations

import json
import math
import warnings
from pathlib import Path

import numpy as np

from .config import InputError

FIGURES = ("fig_peaks.png", "fig_map.png", "fig_recovery.png", "fig_null.png")
CANDIDATE_FIGURE = "fig_candidate_{}.png"
MAX_CANDIDATE_FIGURES = 10
SENSE_LABEL = {False: "flip = false (circle 2 in the same sense)", True: "flip = true (opposite senses)"}
FRAME_NAMES = {"G": "Galactic", "C": "equatorial", "E": "ecliptic"}
UNIT = "µK"


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


# --------------------------------------------------------------------------- significance, as recorded
def calibration_n(*tables):
    """Number of calibration simulations recorded in the tables' metadata (None when absent)."""
    for t in tables:
        if t is None:
            continue
        for key in ("calibration_n_sims", "n_sims"):
            v = t.meta.get(key)
            if v is not None:
                return int(v)
    return None


def p_floor(*tables):
    """The smallest p-value N simulations can give, 1/(N+1), from the tables' metadata (None when absent)."""
    for t in tables:
        if t is not None and t.meta.get("p_floor") is not None:
            return float(t.meta["p_floor"])
    n = calibration_n(*tables)
    return 1.0 / (n + 1) if n else None


def p_text(row, col="p_global", floor=None, n=None):
    """A recorded p-value for print: never below the floor; values at the floor as "<= 1/(N+1)"."""
    if col not in row.colnames:
        return None
    p = float(row[col])
    if not np.isfinite(p):
        return f"{col} n/a"
    beyond = "beyond_sims" in row.colnames and bool(row["beyond_sims"])
    if floor is not None and (beyond or p <= floor * (1 + 1e-9)):
        return f"{col} ≤ {floor:.2g}" + (f" (beyond all {n} simulations)" if beyond and n else "")
    return f"{col} = {p:.2g}"


def is_significant(table):
    """Boolean array of the ``significant`` column (all False when absent: nothing is claimed)."""
    if table is None or "significant" not in table.colnames:
        return np.zeros(0 if table is None else len(table), dtype=bool)
    return np.asarray(table["significant"], dtype=bool)


def shown_candidates(cand, n_top):
    """Row indices of candidates to draw and their status: the significant ones, else the top ``n_top``.

    Status: ``"significant"``, ``"not significant"`` (calibrated, none significant),
    ``"significance not recorded"`` (p-values without a ``significant`` column) or ``"not calibrated"``.  Row order is the ranking.
    """
    if cand is None or len(cand) == 0:
        return [], ""
    sig = is_significant(cand)
    if sig.any():
        return [int(i) for i in np.flatnonzero(sig)[:MAX_CANDIDATE_FIGURES]], "significant"
    status = ("not significant" if "significant" in cand.colnames else
              "significance not recorded" if "p_global" in cand.colnames else "not calibrated")
    return list(range(min(n_top, len(cand), MAX_CANDIDATE_FIGURES))), status


# --------------------------------------------------------------------------- figures
def fig_peaks(peaks, model, thresholds, path, dpi=110):
    """Data grid peaks against radius over the simulations' bands and thresholds, per sense."""
    plt = _plt()
    fig, axes = plt.subplots(1, 2, figsize=(11, 4.4), sharey=True, constrained_layout=True)
    rates = sorted(set(float(a) for a in thresholds["false_alarm"])) if thresholds is not None else []
    colors = ["C3", "C1", "C4", "C5"]
    n = calibration_n(peaks, thresholds) or (model.n_sims if model is not None else None)
    floor = p_floor(peaks, thresholds) if n else None
    unusable_drawn = False
    for ax, flip in zip(axes, (False, True)):
        f = int(flip)
        if model is not None:
            r = model.radii
            P = model.peaks[:, :, f]
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                q = np.nanpercentile(P, [2.5, 16, 50, 84, 97.5], axis=0)
            ax.fill_between(r, q[0], q[4], color="0.88", label=f"{model.n_sims} simulations: 95 %")
            ax.fill_between(r, q[1], q[3], color="0.72", label="simulations: 68 %")
            ax.plot(r, q[2], color="0.4", lw=1, label="simulations: median")
        for a, col in zip(rates, colors):
            sel = (thresholds["flip"] == flip) & np.isclose(thresholds["false_alarm"], a)
            t = thresholds[sel]
            usable = np.asarray(t["usable"], bool) if "usable" in t.colnames else np.ones(len(t), bool)
            if usable.all():
                ax.plot(t["radius_deg"], t["s_threshold"], ls="--", color=col, lw=1.2, label=f"local, rate {a:g}")
                ax.plot(t["radius_deg"], t["s_threshold_global"], ls="-", color=col, lw=1.2,
                        label=f"global, rate {a:g}")
            else:
                ax.plot(t["radius_deg"], t["s_threshold_global"], ls=(0, (2, 2)), color="0.6", lw=0.8,
                        label=None if unusable_drawn else f"rate {a:g}: not resolved by {n} simulations")
                unusable_drawn = True
        if peaks is not None and len(peaks):
            d = peaks[peaks["flip"] == flip]
            ax.plot(d["radius_deg"], d["s"], "o-", color="k", ms=3, lw=1.2, label="data (grid peak)")
            if "p_global" in d.colnames and len(d):
                p = np.asarray(d["p_global"], float)
                if np.any(np.isfinite(p)):
                    k = int(np.nanargmin(np.where(np.isfinite(p), p, np.inf)))
                    ax.annotate(p_text(d[k], "p_global", floor, n), (d["radius_deg"][k], d["s"][k]),
                                xytext=(8, 6), textcoords="offset points", fontsize=8)
        ax.set_title(SENSE_LABEL[flip], fontsize=10)
        ax.set_xlabel("circle radius α [deg]")
        ax.grid(alpha=0.3)
    axes[0].set_ylabel("largest S over centre pairs and twists")
    handles, labels = [], []
    for ax in axes:
        for h, lab in zip(*ax.get_legend_handles_labels()):
            if lab not in labels:
                handles.append(h)
                labels.append(lab)
    fig.legend(handles, labels, fontsize=8, loc="outside lower center", ncol=min(4, max(1, len(labels))),
               frameon=False)
    fig.suptitle("Matched-circle statistic S of the data against isotropic simulations (grid S)", fontsize=11)
    return _save(fig, path, dpi)


EDGE_FRACTION = 1.0 - 1e-7


def split_at_seam(lon_deg, lat_deg, centre_lon=0.0):
    """Split a closed curve on the sphere into pieces that do not cross the map's edge.

    The edge of a full-sky projection centred on ``centre_lon`` is the meridian
    ``centre_lon + 180``.  Each crossing is cut there, with the crossing point
    (interpolated in longitude) added to both pieces, so the drawn curve meets
    the edge instead of jumping across the map.  Returns a list of (lon, lat)
    arrays in degrees, longitudes in [centre_lon - 180, centre_lon + 180].
    """
    lon = np.asarray(lon_deg, float)
    lat = np.asarray(lat_deg, float)
    x = (lon - centre_lon + 180.0) % 360.0 - 180.0            # [-180, 180) about the centre
    start = int(np.argmin(np.abs(x)))                         # start (and close) far from the edge
    x = np.append(np.roll(x, -start), x[start])
    lat = np.append(np.roll(lat, -start), lat[start])
    pieces, cur_x, cur_y = [], [x[0]], [lat[0]]
    for i in range(1, x.size):
        dx = x[i] - x[i - 1]
        if abs(dx) > 180.0:                                      # crossed the edge
            edge = 180.0 if x[i - 1] > 0 else -180.0
            step = dx - math.copysign(360.0, dx)                 # the short way round
            frac = min(1.0, max(0.0, (edge - x[i - 1]) / step)) if step != 0 else 0.0
            y_edge = lat[i - 1] + frac * (lat[i] - lat[i - 1])
            cur_x.append(edge * EDGE_FRACTION)        # exactly +-180 is the same meridian: stay on this side
            cur_y.append(y_edge)
            pieces.append((np.array(cur_x), np.array(cur_y)))
            cur_x, cur_y = [-edge * EDGE_FRACTION], [y_edge]
        cur_x.append(x[i])
        cur_y.append(lat[i])
    pieces.append((np.array(cur_x), np.array(cur_y)))
    if len(pieces) > 1:                                          # the last piece runs on into the first
        last, first = pieces.pop(), pieces[0]
        pieces[0] = (np.concatenate([last[0], first[0][1:]]), np.concatenate([last[1], first[1][1:]]))
    return [(px + centre_lon, py) for px, py in pieces]


def circle_pieces(lon_deg, lat_deg, radius_deg, other=None, n=721):
    """Pieces (lon, lat in degrees) of the circle of ``radius_deg`` about (lon, lat), cut at the map's edge."""
    from . import rings

    c = rings.lonlat_to_vec(float(lon_deg), float(lat_deg))
    pts = rings.ring_points(c, math.radians(float(radius_deg)), n, other)[0]
    lo, la = rings.vec_to_lonlat(pts)
    return split_at_seam(lo, la)


def _draw_circle(hp, lon, lat, radius, **kw):
    for lo, la in circle_pieces(lon, lat, radius):
        hp.projplot(lo, la, lonlat=True, **kw)


def fig_map(prepared, cand, path, n_circles=3, dpi=110, predicted=None):
    """The prepared map (Mollweide, µK, frame named) with candidate circles and predicted circles."""
    import healpy as hp

    from .rings import format_twist

    plt = _plt()
    m = np.array(prepared.map, dtype=float)
    if prepared.mask is not None:
        m[prepared.mask <= 0.5] = hp.UNSEEN
    good = m[m != hp.UNSEEN]
    lim = float(np.percentile(np.abs(good), 99)) if good.size else 1.0
    frame = getattr(prepared, "frame", None)
    frame_text = f"{FRAME_NAMES.get(frame, frame)} coordinates" if frame else "coordinate frame not declared in the map"
    fig = plt.figure(figsize=(10, 6.2))
    rows, status = shown_candidates(cand, n_circles)
    what = {"significant": "significant candidates", "not significant": "top candidates (none significant)",
            "significance not recorded": "top candidates", "not calibrated": "top candidates (not calibrated)",
            "": "no candidates"}[status]
    hp.mollview(m, fig=fig.number, title=f"Prepared map, {frame_text}: {what}", unit=UNIT,
                min=-lim, max=lim, cmap="RdBu_r", badcolor="0.75", hold=True, format="%.0f")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        hp.graticule(dpar=30, dmer=60, alpha=0.3)
    colors = ["k", "C2", "C1", "C4", "C5", "C6", "C7", "C8", "C9", "C0"]
    handles = []
    n = calibration_n(cand)
    floor = p_floor(cand)
    for k, i in enumerate(rows):
        row = cand[i]
        col = colors[k % len(colors)]
        rank = int(row["rank"]) if "rank" in row.colnames else i + 1
        label = (f"#{rank}: α = {row['radius_deg']:.1f}°, S = {row['s']:.2f}, twist {format_twist(row['twist_deg'])}°, "
                 f"flip {str(bool(row['flip'])).lower()}")
        pt = p_text(row, "p_global", floor, n)
        if pt:
            label += ", " + pt
        if status != "significant":
            label += f" — {status}"
        for lon, lat, ls in ((row["lon1_deg"], row["lat1_deg"], "-"), (row["lon2_deg"], row["lat2_deg"], "--")):
            _draw_circle(hp, lon, lat, row["radius_deg"], color=col, lw=1.6, ls=ls)
            hp.projscatter([float(lon)], [float(lat)], lonlat=True, color=col, marker="x", s=30)
        handles.append(plt.Line2D([], [], color=col, lw=1.6, label=label))
    if predicted is not None and len(predicted):
        for row in predicted:
            for lon, lat in ((row["lon1_deg"], row["lat1_deg"]), (row["lon2_deg"], row["lat2_deg"])):
                _draw_circle(hp, lon, lat, row["radius_deg"], color="m", lw=0.9, ls=":")
        r = np.asarray(predicted["radius_deg"], float)
        radii = f"radius {r.min():.1f}°" if np.ptp(r) < 0.05 else f"radii {r.min():.1f}–{r.max():.1f}°"
        handles.append(plt.Line2D([], [], color="m", lw=0.9, ls=":",
                                  label=f"predicted by the configured topology: {len(predicted)} "
                                        f"pair{'s' if len(predicted) != 1 else ''}, {radii}"))
    if handles:
        handles.append(plt.Line2D([], [], color="0.3", lw=1.2, ls="-", label="solid: circle 1, dashed: circle 2"))
        fig.legend(handles=handles, loc="lower center", fontsize=8, ncol=1, frameon=False,
                   bbox_to_anchor=(0.5, -0.02 - 0.025 * max(0, len(handles) - 3)))
    return _save(fig, path, dpi)


def fig_recovery(rec, bound_row, path, level=0.95, dpi=110):
    """Recovered fraction against radius with binomial intervals, the recovery level and alpha_min."""
    plt = _plt()
    fig, ax = plt.subplots(figsize=(7, 4.8), constrained_layout=True)
    r = np.asarray(rec["radius_deg"], float)
    f = np.asarray(rec["fraction"], float)
    lo = np.asarray(rec["ci_low"], float)
    hi = np.asarray(rec["ci_high"], float)
    nn = np.asarray(rec["n"], int) if "n" in rec.colnames else None
    ax.errorbar(r, f, yerr=[np.clip(f - lo, 0, None), np.clip(hi - f, 0, None)], fmt="o-", color="C0",
                capsize=3, label="recovered fraction, 95 % Clopper–Pearson interval")
    if nn is not None:
        for x, y, k in zip(r, f, nn):
            ax.annotate(f"n = {k}", (x, y), xytext=(4, -12), textcoords="offset points", fontsize=7, color="C0")
    ax.axhline(level, color="C3", ls=":", lw=1, label=f"recovery level {level:.0%}")
    if bound_row is not None and np.isfinite(bound_row["alpha_min_deg"]):
        ax.axvline(bound_row["alpha_min_deg"], color="C2", ls="--", lw=1.2,
                   label=f"α_min = {bound_row['alpha_min_deg']:.1f}°")
    ax.set_xlabel("radius α of the largest circles [deg]")
    ax.set_ylabel("fraction of injected skies recovered")
    ax.set_ylim(-0.03, 1.1)
    ax.grid(alpha=0.3)
    d1 = float(rec.meta.get("distance_per_size", 1.0))
    sec = ax.secondary_xaxis("top", functions=(
        lambda a: 2.0 * np.cos(np.radians(np.clip(a, 0.0, 90.0))) / d1,
        lambda L: np.degrees(np.arccos(np.clip(np.asarray(L) * d1 / 2.0, 0.0, 1.0)))))
    sec.set_xlabel("size of space L [χ]", fontsize=9)
    sec.tick_params(labelsize=8)
    ax.legend(fontsize=8, loc="lower right")
    title = "Injection–recovery"
    if "space" in rec.meta:
        title += (f": {rec.meta['space']}, {rec.meta.get('mode', '')} search, {rec.meta.get('threshold', '')} "
                  f"threshold at false-alarm rate {rec.meta.get('false_alarm', '')}")
        if rec.meta.get("physics"):
            title += f", {rec.meta['physics']} physics"
    fig.suptitle(title, fontsize=10)
    return _save(fig, path, dpi)


def _tail_pdf(thr_rows, kind, x):
    """Density of a fitted tail from its recorded location and scale (None when not recorded)."""
    import scipy.stats

    if thr_rows is None or len(thr_rows) == 0 or "fit_loc" not in thr_rows.colnames:
        return None
    loc, scale = float(thr_rows["fit_loc"][0]), float(thr_rows["fit_scale"][0])
    if not (np.isfinite(loc) and np.isfinite(scale) and scale > 0) or kind != "gumbel":
        return None
    return scipy.stats.gumbel_r(loc, scale).pdf(x)


def _hist_empirical(ax, values, label):
    values = values[np.isfinite(values)]
    ax.hist(values, bins=max(6, int(np.sqrt(values.size)) + 2), density=True, color="0.78", edgecolor="0.5",
            label=label)
    ax.plot(values, np.zeros_like(values), "|", color="0.2", ms=12, mew=1)
    return values


def fig_null(model, peaks, path, dpi=110, thresholds=None):
    """The simulations' values (empirical), any fitted tail drawn apart (descriptive), and the data's value."""
    plt = _plt()
    n = model.n_sims
    floor = p_floor(peaks, thresholds) or 1.0 / (n + 1)
    best = None
    if peaks is not None and "p_global" in peaks.colnames and len(peaks):
        best = peaks[_most_significant_index(peaks)]
    minp = getattr(model, "null_minp", None)
    panels = 2 if minp is not None and np.any(np.isfinite(minp)) and best is not None else 1
    fig, axes = plt.subplots(1, panels, figsize=(5.6 * panels, 4.4), constrained_layout=True, squeeze=False)
    axes = axes[0]
    # local panel: grid peak S of the simulations at the data's most significant radius and sense
    ax = axes[0]
    ir, f = (model.radius_index(best["radius_deg"]), int(bool(best["flip"]))) if best is not None else (0, 0)
    P = _hist_empirical(ax, model.peaks[:, ir, f], f"{n} simulations (empirical)")
    x = np.linspace(min(P.min(), float(best["s"]) if best is not None else P.min()) - 0.03,
                    max(P.max(), float(best["s"]) if best is not None else P.max()) + 0.03, 300)
    tail_kind = str(thresholds.meta.get("tail", "")) if thresholds is not None else ""
    if thresholds is not None:
        rows = thresholds[np.isclose(thresholds["radius_deg"], model.radii[ir]) & (thresholds["flip"] == bool(f))]
        pdf = _tail_pdf(rows, tail_kind, x)
        if pdf is not None:
            ax.plot(x, pdf, color="C0", ls="--", lw=1.2, label=f"fitted {tail_kind} tail (descriptive, not used for p)")
    if best is not None:
        ax.axvline(float(best["s"]), color="C3", lw=1.5,
                   label=f"data: S = {float(best['s']):.3f}, " + (p_text(best, "p_local", floor, n) or ""))
    ax.set_xlabel(f"largest grid S at radius {model.radii[ir]:g}° and flip {str(bool(f)).lower()}")
    ax.set_ylabel("density")
    ax.set_title("one radius and sense", fontsize=10)
    ax.legend(fontsize=8, loc="upper left")
    if panels == 2:
        # the look-elsewhere null actually used: each simulation's smallest local p over all radii and
        # senses (leave-one-out), against which the data's local p is ranked (min-p method)
        ax = axes[1]
        m = np.asarray(minp, float)
        m = m[np.isfinite(m)]
        edges = (np.arange(n + 2) + 0.5) / (n + 1)
        ax.hist(m, bins=edges, color="0.6", label=f"{n} simulations: smallest local p (empirical)")
        pl = float(best["p_local"])
        ax.axvline(pl, color="C3", lw=1.5, label="data: p_local = " + f"{pl:.3g}, "
                   + (p_text(best, "p_global", floor, n) or ""))
        ax.set_xscale("log")
        ax.set_xlim(0.5 / (n + 1), 1.0)
        ax.set_xlabel("smallest local p over all radii and senses (floor 1/(N+1))")
        ax.set_ylabel("simulations")
        ax.set_title("look-elsewhere: all radii and senses (min-p)", fontsize=10)
        ax.legend(fontsize=8, loc="upper right")
    fig.suptitle(f"Null distribution from {n} isotropic simulations; p-values are empirical, "
                 f"never below 1/(N+1) = {floor:.2g}", fontsize=10)
    return _save(fig, path, dpi)


# --------------------------------------------------------------------------- candidate inspection
def candidate_profiles(alm, lmax, mask, row, weighting="m", oversample=8):
    """The two ring profiles of a candidate as the S statistic compares them, and S against twist.

    Parameters
    ----------
    alm : complex ndarray
        Harmonic coefficients of the prepared map (healpy order, µK).
    lmax : int
        Their band limit.
    mask : ndarray or None
        HEALPix RING 0/1 mask of the prepared map (1 = use).
    row : mapping
        A candidate: ``lon1_deg, lat1_deg, lon2_deg, lat2_deg, radius_deg`` [deg],
        ``twist_deg`` [deg] and ``flip``.
    weighting : {"m", "flat"}
        The search's weighting; with ``"m"`` each profile is the ring less its mean
        over valid samples, filtered by sqrt(|m|) (:func:`twinring.statistic.ring_spectra`).

    Returns
    -------
    dict
        ``phi_deg`` (N,) phases of circle 1 [deg]; ``t1``, ``t2`` (N,) the profiles [µK, filtered]
        of circle 1 at phi and circle 2 at phi + twist (flip false) or twist - phi (flip true),
        NaN where either sample is masked; ``raw1``, ``raw2`` the unfiltered ring values [µK];
        ``s_profiles`` the Cornish, Spergel & Starkman (1998) S = 2 <t1 t2> / <t1^2 + t2^2> of
        the profiles; ``twist_grid_deg`` (N * oversample,) and ``s_curve`` {False: ..., True: ...}
        S against twist for both senses.
    """
    from . import rings, statistic

    alpha = math.radians(float(row["radius_deg"]))
    c1 = rings.lonlat_to_vec(float(row["lon1_deg"]), float(row["lat1_deg"]))
    c2 = rings.lonlat_to_vec(float(row["lon2_deg"]), float(row["lat2_deg"]))
    flip = bool(row["flip"])
    twist = math.radians(float(row["twist_deg"]))
    nsamp = rings.samples_for(alpha, lmax)
    k = np.arange(nsamp)
    # circle 1 at phases phi_k; circle 2 at phi_k + twist (flip false) or twist - phi_k (flip true)
    p1 = rings.ring_points(c1, alpha, nsamp, other=c2)[0]
    p2 = rings.ring_points(c2, alpha, nsamp, other=c1, phase0=twist)[0]
    if flip:
        p2 = p2[(-k) % nsamp]
    raw = rings.synthesize_at(alm, lmax, np.concatenate([p1, p2]))
    u = rings.mask_at(mask, np.concatenate([p1, p2]))
    spec = statistic.ring_spectra(raw.reshape(2, nsamp), None if u is None else u.reshape(2, nsamp), weighting)
    prof = np.fft.irfft(spec.b.astype(np.complex128), n=nsamp, axis=-1)
    valid = np.ones(nsamp, bool) if u is None else (u[:nsamp] > 0.5) & (u[nsamp:] > 0.5)
    t1 = np.where(valid, prof[0], np.nan)
    t2 = np.where(valid, prof[1], np.nan)
    s_prof = float(2 * np.nansum(t1 * t2) / np.nansum(t1 ** 2 + t2 ** 2)) if valid.any() else float("nan")
    # S against twist: both circles from phase 0 in the pair convention
    q2 = rings.ring_points(c2, alpha, nsamp, other=c1)[0]
    v2 = rings.synthesize_at(alm, lmax, q2)
    w2 = rings.mask_at(mask, q2)
    curves = {}
    for sense in (False, True):
        if u is None:
            curves[sense] = statistic.s_curve(raw[:nsamp], v2, sense, weighting, oversample=oversample)
        else:
            curves[sense] = statistic.s_curve(raw[:nsamp], v2, sense, weighting, u[:nsamp], w2)
    n_out = curves[False].size
    return dict(phi_deg=360.0 * k / nsamp, t1=t1, t2=t2, raw1=np.where(valid, raw[:nsamp], np.nan),
                raw2=np.where(valid, raw[nsamp:], np.nan), s_profiles=s_prof, valid=valid,
                twist_grid_deg=360.0 * np.arange(n_out) / n_out, s_curve=curves, nsamp=nsamp)


def fig_candidate(prepared, row, path, weighting="m", dpi=110, status="", p_label=None):
    """Profiles of a candidate's two circles at its best twist and sense, and S against twist."""
    from .rings import format_twist

    plt = _plt()
    d = candidate_profiles(prepared.alm, prepared.lmax, prepared.mask, row, weighting)
    flip = bool(row["flip"])
    fig, (a1, a2) = plt.subplots(2, 1, figsize=(8.5, 7.2), constrained_layout=True)
    if isinstance(weighting, np.ndarray):
        wtxt = "less its mean, filtered by the optimal ring weights"
    else:
        wtxt = "less its mean, filtered by √|m|" if weighting == "m" else "less its mean"
    a1.plot(d["phi_deg"], d["t1"], color="C0", lw=1.3, label="circle 1 at φ")
    a1.plot(d["phi_deg"], d["t2"], color="C3", lw=1.1, ls="--",
            label=f"circle 2 at {'twist − φ' if flip else 'φ + twist'}")
    a1.set_xlim(0, 360)
    a1.set_xlabel("phase φ on circle 1 [deg]")
    a1.set_ylabel(f"ring profile [{UNIT}, {wtxt}]")
    a1.set_title(f"profiles at twist {format_twist(row['twist_deg'])}°, flip {str(flip).lower()}: "
                 f"S = 2⟨T₁T₂⟩/⟨T₁² + T₂²⟩ = {d['s_profiles']:.3f}", fontsize=10)
    a1.legend(fontsize=8, loc="upper right")
    a1.grid(alpha=0.3)
    for sense, col in ((False, "C0"), (True, "C3")):
        a2.plot(d["twist_grid_deg"], d["s_curve"][sense], color=col, lw=1.1 if sense == flip else 0.8,
                alpha=1.0 if sense == flip else 0.6, label=SENSE_LABEL[sense])
    a2.axvline(float(np.mod(float(row["twist_deg"]), 360.0)), color="k", ls=":", lw=1,
               label=f"candidate twist {format_twist(row['twist_deg'])}°")
    a2.set_xlim(0, 360)
    a2.set_ylim(-1.02, 1.02)
    a2.set_xlabel("twist [deg]")
    a2.set_ylabel("S")
    a2.legend(fontsize=8, loc="lower right")
    a2.grid(alpha=0.3)
    rank = int(row["rank"]) if "rank" in row.colnames else 0
    head = (f"Candidate #{rank}: α = {float(row['radius_deg']):.2f}°, centres ({float(row['lon1_deg']):.1f}°, "
            f"{float(row['lat1_deg']):.1f}°) and ({float(row['lon2_deg']):.1f}°, {float(row['lat2_deg']):.1f}°), "
            f"S = {float(row['s']):.3f}")
    tail = ", ".join(x for x in (p_label, status) if x)
    fig.suptitle(head + (f"\n{tail}" if tail else ""), fontsize=10)
    _save(fig, path, dpi)
    return Path(path), d


# --------------------------------------------------------------------------- summary
def _row_dict(row, cols):
    from .rings import wrap_twist_deg

    out = {}
    for c in cols:
        if c in row.colnames:
            v = row[c]
            if isinstance(v, (np.bool_, bool)):
                out[c] = bool(v)
            elif isinstance(v, (np.integer,)):
                out[c] = int(v)
            elif isinstance(v, (np.floating, float)):
                if c == "twist_deg" and np.isfinite(v):
                    v = wrap_twist_deg(float(v), 3)
                out[c] = None if not np.isfinite(v) else float(f"{float(v):.6g}")
            else:
                out[c] = str(v)
    return out


CAND_COLS = ("rank", "radius_deg", "lon1_deg", "lat1_deg", "lon2_deg", "lat2_deg", "separation_deg", "twist_deg",
             "flip", "s", "s_grid", "z", "p_local", "p_global", "beyond_sims", "p_global_tail", "significant")
PEAK_COLS = ("radius_deg", "flip", "s", "z", "p_local", "p_global", "beyond_sims", "p_global_tail", "significant")


def _most_significant_index(table):
    """Row that ranks first in the calibrated ranking (calibrate.rank_order: p_global, z, grid S)."""
    from .calibrate import rank_order

    return int(rank_order(table, "s_grid" if "s_grid" in table.colnames else "s")[0])


def summarize(run_dir, cfg=None, figures=()):
    """The headline result of a run directory as a dict (read from its tables; nothing recomputed)."""
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
    n = calibration_n(cand, peaks, thr)
    if cand is not None and len(cand):
        out["best_candidate"] = _row_dict(cand[0], CAND_COLS)
        sig = is_significant(cand)
        out["significant_candidates"] = [_row_dict(cand[int(i)], CAND_COLS) for i in np.flatnonzero(sig)]
        if "p_global" in cand.colnames:
            out["most_significant_candidate"] = _row_dict(cand[_most_significant_index(cand)], CAND_COLS)
    if peaks is not None and "p_global" in peaks.colnames and len(peaks):
        out["most_significant_peak"] = _row_dict(peaks[_most_significant_index(peaks)], PEAK_COLS)
    if thr is not None or n:
        meta = thr.meta if thr is not None else {}
        out["calibration"] = {"n_sims": n, "p_floor": p_floor(cand, peaks, thr), "spectrum": meta.get("spectrum"),
                              "tail": meta.get("tail"), "global_fit_ks_p": meta.get("global_fit_ks_p")}
        if thr is not None:
            out["calibration"]["thresholds"] = [
                _row_dict(row, ("radius_deg", "flip", "false_alarm", "s_threshold", "s_threshold_global", "method",
                                "usable")) for row in thr]
            if "usable" in thr.colnames:
                rates = sorted(set(float(a) for a in thr["false_alarm"]))
                out["calibration"]["rates_not_usable"] = [
                    a for a in rates if not np.all(np.asarray(thr["usable"])[np.isclose(thr["false_alarm"], a)])]
    if rec is not None:
        out["recovery"] = [_row_dict(r, ("size_chi", "radius_deg", "n", "detected", "fraction", "ci_low", "ci_high")
                                     + tuple(c for c in ("s_mean", "s_expected") if c in rec.colnames))
                           for r in rec]
        out["recovery_setup"] = {k: rec.meta.get(k) for k in ("space", "mode", "threshold", "false_alarm",
                                                               "realizations", "noise_uk_arcmin", "physics")}
    if bnd is not None and len(bnd):
        out["bound"] = _row_dict(bnd[0], ("space", "alpha_min_deg", "size_chi", "size_gpc", "chi_gpc",
                                          "recovery_level", "false_alarm", "n_significant", "statement"))
    _inputs_and_consistency(out, d, cand, peaks, thr)
    out["headline"] = headline(out)
    return out


INPUT_KEYS = ("map_unit", "map_frame", "map_field", "map_ordering")


def _inputs_and_consistency(out, d, *tables):
    """Hook: the input map's unit, frame, field (from the tables' provenance) and a several-map comparison."""
    from .consistency import summary as consistency_summary

    meta = next((t.meta for t in tables if t is not None and "map_unit" in t.meta), None)
    if meta is not None:
        out["input"] = {k[len("map_"):]: meta.get(k) for k in INPUT_KEYS}
    c = consistency_summary(d)
    if c is not None:
        out["consistency"] = c


def _pair_text(b):
    from .rings import format_twist

    return (f"S = {b['s']:.3f} at radius {b['radius_deg']:.1f} deg, twist {format_twist(b['twist_deg'])} deg, "
            f"flip {str(b['flip']).lower()}") if "twist_deg" in b else \
        f"S = {b['s']:.3f} at radius {b['radius_deg']:.1f} deg, flip {str(b['flip']).lower()}"


def _p_sentence(b, n, floor):
    p = b.get("p_global")
    if p is None:
        return "p_global n/a"
    if b.get("beyond_sims") or (floor is not None and p <= floor * (1 + 1e-9)):
        return f"p_global ≤ {floor:.2g} (beyond all {n} simulations)" if b.get("beyond_sims") else \
            f"p_global ≤ {floor:.2g} from {n} simulations"
    return f"p_global = {p:.2g} from {n} simulations"


def headline(s) -> str:
    cal = s.get("calibration", {})
    n, floor = cal.get("n_sims"), cal.get("p_floor")
    sig = s.get("significant_candidates") or []
    if sig:
        names = "; ".join(f"#{b.get('rank', i + 1)}: {_pair_text(b)}, {_p_sentence(b, n, floor)}"
                          for i, b in enumerate(sig[:3]))
        more = f" and {len(sig) - 3} more" if len(sig) > 3 else ""
        return f"Matched circles detected: {len(sig)} significant pair{'s' if len(sig) != 1 else ''} ({names}{more})."
    if "bound" in s:
        return s["bound"]["statement"]
    b = s.get("best_candidate")
    if b is None and "consistency" in s:
        from .consistency import headline as consistency_headline

        return consistency_headline(s["consistency"])
    if b is not None and "significant" in b:
        return (f"No significant circle pair; the first-ranked, {_pair_text(b)}, has {_p_sentence(b, n, floor)} "
                "(not significant).")
    if b is not None and "p_global" in b:
        return (f"First-ranked circle pair: {_pair_text(b)}, {_p_sentence(b, n, floor)} (this calibration records "
                "no significance).")
    if b is not None:
        return (f"Best circle pair: {_pair_text(b)} (not calibrated: run `twinring calibrate` for p-values).")
    return "No search results in this directory."


def summary_markdown(s) -> str:
    from .rings import format_twist

    lines = ["# twinring run summary", "", f"**{s['headline']}**", ""]
    if "search" in s:
        q = s["search"]
        lines += [f"- search: {q['family']} pairs, radii {q['radius_deg'][0]:g}-{q['radius_deg'][1]:g} deg step "
                  f"{q['radius_deg'][2]:g}, centre grid nside {q['nside_centers']}, weighting {q['weighting']}"]
    if "calibration" in s:
        c = s["calibration"]
        line = f"- calibration: {c['n_sims']} isotropic Gaussian simulations"
        if c.get("spectrum"):
            line += f" (spectrum {c['spectrum']})"
        if c.get("p_floor") is not None:
            line += f"; no p-value is printed below 1/(N+1) = {c['p_floor']:.2g}"
        lines.append(line)
        if c.get("rates_not_usable"):
            lines.append("- false-alarm rates the simulations cannot resolve (thresholds not usable): "
                         + ", ".join(f"{a:g}" for a in c["rates_not_usable"]))
    n, floor = s.get("calibration", {}).get("n_sims"), s.get("calibration", {}).get("p_floor")
    for key, title in (("best_candidate", "first-ranked candidate"),
                       ("most_significant_candidate", "smallest p_global among candidates")):
        if key in s:
            b = s[key]
            extra = f", {_p_sentence(b, n, floor)}" if "p_global" in b else ""
            if "significant" in b:
                extra += ", significant" if b["significant"] else ", not significant"
            grid = b.get("s_grid")
            lines += [f"- {title}: S = {b['s']:.3f}" + (f" (grid {grid:.3f})" if grid is not None else "") +
                      f" at radius {b['radius_deg']:.2f} deg, centres ({b['lon1_deg']:.1f}, {b['lat1_deg']:.1f}) and "
                      f"({b['lon2_deg']:.1f}, {b['lat2_deg']:.1f}), twist {format_twist(b['twist_deg'])} deg, "
                      f"flip {str(b['flip']).lower()}{extra}"]
    if "input" in s:
        i = s["input"]
        lines.append(f"- input map: unit {i['unit']}, frame {i['frame']}, field {i['field']}, ordering {i['ordering']}")
    if "consistency" in s:
        from .consistency import markdown as consistency_markdown

        lines += consistency_markdown(s["consistency"])
    if "recovery" in s:
        lines += ["", "| radius [deg] | size [chi] | recovered | 95 % interval | mean S, injections | "
                      "expected S, model |", "|---|---|---|---|---|---|"]
        for r in s["recovery"]:
            lines.append(f"| {r['radius_deg']:.1f} | {r['size_chi']:.3f} | {r['detected']}/{r['n']} | "
                         f"{_fmt(r['ci_low'])}-{_fmt(r['ci_high'])} | {_fmt(r.get('s_mean'))} | "
                         f"{_fmt(r.get('s_expected'))} |")
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
    except Exception:
        return None


def _null_model(d):
    from .calibrate import load_null_model

    try:
        return load_null_model(d) if (d / "null_peaks.ecsv").exists() else None
    except InputError:
        return None


def make_report(run_dir, cfg=None, log=None):
    """Draw every figure the directory's contents allow, write summary.md / summary.json. Returns the summary.

    ``log``: accepted for the stage interface; the figures are listed in the returned summary, and the
    caller logs them (once).
    """
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
    figures = []
    peaks, cand = _read(d, "peaks.ecsv"), _read(d, "candidates.ecsv")
    thr, rec, bnd = _read(d, "thresholds.ecsv"), _read(d, "recovery.ecsv"), _read(d, "bound.ecsv")
    model = _null_model(d)
    if peaks is not None or model is not None:
        figures.append(fig_peaks(peaks, model, thr, d / FIGURES[0], dpi))
    prepared = read_prepared(d) if (d / PREPARED_MAP).exists() else None
    if prepared is not None:
        figures.append(fig_map(prepared, cand, d / FIGURES[1], n_circles, dpi, _read(d, "circles.ecsv")))
    if rec is not None and len(rec):
        figures.append(fig_recovery(rec, bnd[0] if bnd is not None and len(bnd) else None, d / FIGURES[2], level, dpi))
    if model is not None and model.n_sims > 0:
        figures.append(fig_null(model, peaks, d / FIGURES[3], dpi, thr))
    for old in d.glob(CANDIDATE_FIGURE.format("*")):      # figures of an earlier report
        old.unlink()
    if prepared is not None and cand is not None and len(cand):
        weighting = cfg.search.weighting if cfg is not None else str(cand.meta.get("weighting", "m"))
        from .filters import run_filter, weights_at

        table = run_filter(cfg) if cfg is not None else None     # the optimal filter's ring weights, or None
        rows, status = shown_candidates(cand, n_circles)
        n, floor = calibration_n(cand, thr), p_floor(cand, thr)
        for i in rows:
            row = cand[i]
            rank = int(row["rank"]) if "rank" in row.colnames else i + 1
            w = weighting
            if table is not None:       # the optimal filter's weights at this candidate's radius
                from . import rings

                w = weights_at(table, float(row["radius_deg"]),
                               rings.samples_for(math.radians(float(row["radius_deg"])), prepared.lmax))
            path, _ = fig_candidate(prepared, row, d / CANDIDATE_FIGURE.format(rank), w, dpi, status,
                                    p_text(row, "p_global", floor, n))
            figures.append(path)
    figures += exclusion_figures(d, dpi)
    s = summarize(d, cfg, figures)
    write_text(d / "summary.json", json.dumps(s, indent=2, default=str, ensure_ascii=False) + "\n")
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
