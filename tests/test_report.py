"""Report: figures from a run directory's tables, summary.md and summary.json.

The fake run directories carry the calibration's table contract (p_local, p_global floored at
1/(N+1), beyond_sims, p_global_tail, significant; thresholds with ``usable``): the report reads
those columns and never computes a p-value itself.
"""
from __future__ import annotations

import json
import math
import re

import healpy as hp
import numpy as np
import pytest
import scipy.stats
from astropy.table import Table
from matplotlib.image import imread

from twinring import bound, inject, report, rings, stages
from twinring.prepare import Prepared, write_prepared
from twinring.results import write_table

RADII = np.arange(20.0, 81.0, 10.0)
N_SIMS = 30


def _empirical_p(null, s):
    """(1 + #{simulations >= s}) / (N + 1) (Davison & Hinkley 1997, ch. 4) - fake data only."""
    return (1 + np.sum(null >= s)) / (null.size + 1)


def fake_run(d, with_bound=True, with_calibration=True, significant=False, usable_rates=(0.05,)):
    """A run directory with tables of the right shape (values drawn from known laws)."""
    rng = np.random.default_rng(4)
    # null maxima: Gumbel with a location falling with radius (common practice: more samples, smaller maxima)
    loc = 0.75 - 0.003 * (RADII - 20)
    null = scipy.stats.gumbel_r(loc[None, :, None], 0.03).rvs(size=(N_SIMS, RADII.size, 2), random_state=rng)
    data = null.mean(axis=0) + 0.5 * null.std(axis=0)
    data[2, 1] = null[:, 2, 1].max() + 0.05                     # a strong pair at 40 deg, flip true
    peaks = Table({"radius_deg": np.repeat(RADII, 2), "flip": np.tile([False, True], RADII.size),
                   "s": data.ravel()})
    cand = Table({"rank": [1, 2, 3], "radius_deg": [40.3, 20.0, 70.0], "lon1_deg": [10.0, 200.0, 175.0],
                  "lat1_deg": [30.0, -10.0, 5.0], "lon2_deg": [190.0, 20.0, 355.0], "lat2_deg": [-30.0, 10.0, -5.0],
                  "separation_deg": [180.0, 180.0, 180.0], "twist_deg": [359.97, 12.0, 90.0],
                  "flip": [True, False, True], "s": [0.95, 0.80, 0.78], "s_grid": [data[2, 1], 0.78, 0.70]})
    floor = 1.0 / (N_SIMS + 1)
    if with_calibration:
        for t, s_col in ((peaks, "s"), (cand, "s_grid")):
            ir = [int(np.argmin(np.abs(RADII - r))) for r in t["radius_deg"]]
            f = np.asarray(t["flip"], int)
            t["z"] = [(s - null[:, i, k].mean()) / null[:, i, k].std() for s, i, k in zip(t[s_col], ir, f)]
            t["p_local"] = [_empirical_p(null[:, i, k], s) for s, i, k in zip(t[s_col], ir, f)]
            t["beyond_sims"] = [bool(s > null[:, i, k].max()) for s, i, k in zip(t[s_col], ir, f)]
            t["p_global"] = np.minimum(1.0, np.asarray(t["p_local"]) * 3)       # any family-wise inflation
            t["p_global"][t["beyond_sims"]] = floor
            t["p_global_tail"] = np.asarray(t["p_global"]) * 1e-6           # an extrapolated tail, descriptive
            t["significant"] = np.zeros(len(t), bool)
            t.meta.update(calibration_n_sims=N_SIMS, p_floor=floor)
        if significant:
            cand["significant"][0] = True
        rows = []
        for i, r in enumerate(RADII):
            for k in (0, 1):
                fit = scipy.stats.gumbel_r.fit(null[:, i, k])
                for a in (0.01, 0.05):
                    q = float(np.quantile(null[:, i, k], 1 - a))
                    rows.append((r, bool(k), a, q, q + 0.02, a in usable_rates, fit[0], fit[1]))
        thr = Table(rows=rows, names=["radius_deg", "flip", "false_alarm", "s_threshold", "s_threshold_global",
                                      "usable", "fit_loc", "fit_scale"])
        write_table(thr, d / "thresholds.ecsv", {"n_sims": N_SIMS, "tail": "gumbel", "p_floor": floor})
        sim, ir, f = np.meshgrid(np.arange(N_SIMS), np.arange(RADII.size), np.arange(2), indexing="ij")
        write_table(Table({"sim": sim.ravel(), "radius_deg": RADII[ir.ravel()], "flip": f.ravel().astype(bool),
                           "s_max": null.ravel()}), d / "null_peaks.ecsv", {"n_sims": N_SIMS, "tail": "gumbel"})
    write_table(peaks, d / "peaks.ecsv")
    write_table(cand, d / "candidates.ecsv", dict(cand.meta, weighting="m"))
    nside, lmax = 16, 32
    alm = hp.map2alm(rng.normal(size=hp.nside2npix(nside)) * 30, lmax=lmax)
    m = hp.alm2map(alm, nside, lmax=lmax)
    mask = (np.abs(hp.pix2vec(nside, np.arange(m.size))[2]) > 0.2).astype(float)
    write_prepared(Prepared(alm=alm, lmax=lmax, nside=nside, map=m, mask=mask, fwhm_deg=3.0, frame="G"), d)
    if with_bound:
        rows = [dict(size_index=i, realization=j, size_chi=2 * math.cos(math.radians(r)), radius_deg=r, n_targets=3,
                     flip=True, s=0.9, s_threshold=0.8, radius_found_deg=r, in_range=True, detected=(r >= 45 or j == 0))
                for i, r in enumerate((30.0, 50.0, 70.0)) for j in range(4)]
        rec = inject.recovery_table(inject.injections_table(rows))
        write_table(rec, d / "recovery.ecsv", {"space": "E1", "shape_lengths": [1.0, 1.0, 1.0], "mode": "targeted",
                                               "threshold": "global", "false_alarm": 0.01, "distance_per_size": 1.0})
        row = bound.bound_row(rec, 0.95, 0.01, [], 2.0, 1.0, 13.9, "cubic three-torus (E1)", point_fraction=True)
        write_table(bound.bound_table(row), d / "bound.ecsv")
    return null, peaks, cand


def _names(s):
    return sorted(p.split("/")[-1] for p in s["figures"])


def test_report_draws_every_figure_and_a_summary(tmp_path):
    null, peaks, cand = fake_run(tmp_path)
    s = report.make_report(tmp_path)
    # nothing significant: the top 3 of the ranking get candidate figures
    assert _names(s) == sorted(list(report.FIGURES) + [f"fig_candidate_{k}.png" for k in (1, 2, 3)])
    for f in _names(s):
        img = imread(tmp_path / f)
        assert img.shape[0] > 300 and img.shape[1] > 500
        assert np.std(img[..., :3]) > 0.05                # not a blank canvas
    # no significant candidate: the headline is the bound's sentence; alpha_min = 50 deg -> L > 2 cos 50 deg chi
    # (CSS 1998 geometry)
    assert s["bound"]["alpha_min_deg"] == 50.0
    assert s["bound"]["size_gpc"] == pytest.approx(2 * 13.9 * math.cos(math.radians(50.0)), rel=1e-4)
    assert s["headline"] == s["bound"]["statement"]
    again = json.loads((tmp_path / "summary.json").read_text())
    assert again["headline"] == s["headline"]
    assert again["most_significant_peak"]["radius_deg"] == 40.0 and again["most_significant_peak"]["flip"] is True
    assert again["most_significant_peak"]["beyond_sims"] is True
    assert again["calibration"]["n_sims"] == N_SIMS and again["calibration"]["rates_not_usable"] == [0.01]
    md = (tmp_path / "summary.md").read_text()
    assert s["headline"] in md and "| 30.0 | 1.732 | 1/4 |" in md and "![fig_null](fig_null.png)" in md
    assert "cannot resolve (thresholds not usable): 0.01" in md


def test_no_p_below_the_floor_anywhere(tmp_path):
    # Monte Carlo p-values cannot go below 1/(N+1) (Davison & Hinkley 1997, ch. 4; North, Curtis & Sham 2002)
    fake_run(tmp_path, with_bound=False)
    s = report.make_report(tmp_path)
    floor = 1.0 / (N_SIMS + 1)
    text = (tmp_path / "summary.md").read_text() + s["headline"]
    for m in re.finditer(r"p_(?:global|local) = ([0-9.eE+-]+)", text):
        assert float(m.group(1)) >= floor * (1 - 1e-9), m.group(0)
    assert f"≤ {floor:.2g}" in text
    assert "not significant" in s["headline"] and "1e-0" not in s["headline"]
    # a table of an older calibration with an extrapolated p far below the floor is printed at the floor
    row = Table({"p_global": [5.6e-23], "beyond_sims": [False]})[0]
    assert report.p_text(row, "p_global", floor, N_SIMS) == f"p_global ≤ {floor:.2g}"
    row = Table({"p_global": [0.2], "beyond_sims": [False]})[0]
    assert report.p_text(row, "p_global", floor, N_SIMS) == "p_global = 0.2"


def test_significant_candidates_drive_headline_map_and_candidate_figures(tmp_path):
    fake_run(tmp_path, with_bound=True, significant=True)
    s = report.make_report(tmp_path)
    assert s["headline"].startswith("Matched circles detected: 1 significant pair (#1:")
    assert "twist 0.0 deg" in s["headline"]                        # 359.97 printed in [0, 360)
    assert [n for n in _names(s) if n.startswith("fig_candidate")] == ["fig_candidate_1.png"]


def test_uncalibrated_run(tmp_path):
    fake_run(tmp_path, with_bound=False, with_calibration=False)
    s = report.make_report(tmp_path)
    assert "not calibrated" in s["headline"]
    assert _names(s) == ["fig_candidate_1.png", "fig_candidate_2.png", "fig_candidate_3.png", "fig_map.png",
                         "fig_peaks.png"]


def _capture(monkeypatch):
    figs = []

    def keep(fig, path, dpi):
        figs.append(fig)
        return path

    monkeypatch.setattr(report, "_save", keep)
    return figs


def test_unusable_thresholds_are_not_drawn_as_usable(tmp_path, monkeypatch):
    fake_run(tmp_path, with_bound=False, usable_rates=(0.05,))
    figs = _capture(monkeypatch)
    from twinring.calibrate import load_null_model
    from twinring.results import read_table

    thr = read_table(tmp_path / "thresholds.ecsv")
    report.fig_peaks(read_table(tmp_path / "peaks.ecsv"), load_null_model(tmp_path), thr, tmp_path / "x.png")
    labels = [l.get_label() for ax in figs[0].axes for l in ax.get_lines()]
    assert "global, rate 0.05" in labels and "local, rate 0.05" in labels
    assert "global, rate 0.01" not in labels and "local, rate 0.01" not in labels
    assert any("rate 0.01: not resolved by 30 simulations" == l for l in labels)
    grey = [l for ax in figs[0].axes for l in ax.get_lines() if l.get_color() == "0.6"]
    assert len(grey) == 2                                           # one per sense


def test_map_circles_are_cut_at_the_projection_edge():
    # a circle about lon 180 crosses the Mollweide edge twice (common practice, no source); healpy's own
    # Mollweide projector must see no jump across the map within a piece
    pieces = report.circle_pieces(180.0, 10.0, 30.0)
    assert len(pieces) == 2
    proj = hp.projector.MollweideProj()
    for lon, lat in pieces:
        assert np.all(np.abs(np.diff(lon)) < 5.0)
        x, y = proj.ang2xy(lon, lat, lonlat=True)
        assert np.max(np.hypot(np.diff(x), np.diff(y))) < 0.05
    ends = sorted(abs(p[0][i]) for p in pieces for i in (0, -1))
    assert ends == pytest.approx([180.0] * 4, abs=1e-4)
    # every drawn point lies on the circle (angular distance 30 deg from the centre)
    c = rings.lonlat_to_vec(180.0, 10.0)
    for lon, lat in pieces:
        d = rings.separation_deg(rings.lonlat_to_vec(lon, lat), c)
        assert np.allclose(d, 30.0, atol=0.01)
    # a circle away from the edge stays one piece
    assert len(report.circle_pieces(0.0, 0.0, 30.0)) == 1


def test_candidate_figure_profiles_correlate_to_the_reported_s(tmp_path, monkeypatch):
    """For a torus pair the plotted profiles' correlation is the S reported for that pair at that twist.

    S = 2 <T1 T2> / <T1^2 + T2^2> (Cornish, Spergel & Starkman 1998) computed here from the plotted
    lines; the |m| weighting (Cornish et al. 2004) is the sqrt(|m|) filter applied to each profile.
    """
    import twinring

    sky, alm = twinring.make_sky("E1", [1.2, 1.2, 1.2], nside=32, lmax=48, fwhm_deg=4.0, return_alm=True)
    prep = twinring.prepare_map(sky, nside=32, lmax=48, fwhm_deg=4.0)
    cand, _ = twinring.search_map(prep, nside_centers=8, radius_deg=[48, 58, 2], top=4)
    # a face pair of the cubic torus: radius 53.13 deg, twist 0, flip true (CSS 1998); on this coarse grid a
    # chance pair may rank above it by grid S, so the pair is picked by its geometry
    faces = [r for r in cand if abs(r["radius_deg"] - 53.13) < 1.0 and bool(r["flip"])]
    assert faces
    row = faces[0]
    assert row["twist_deg"] < 1.0 or row["twist_deg"] > 359.0
    figs = _capture(monkeypatch)
    _, d = report.fig_candidate(prep, row, tmp_path / "c.png", weighting="m")
    lines = figs[0].axes[0].get_lines()
    t1, t2 = lines[0].get_ydata(), lines[1].get_ydata()
    ok = np.isfinite(t1) & np.isfinite(t2)
    s_plot = 2 * np.mean(t1[ok] * t2[ok]) / np.mean(t1[ok] ** 2 + t2[ok] ** 2)
    # the search reports s at a twist interpolated between its twist samples: agreement to 1e-3
    assert s_plot == pytest.approx(float(row["s"]), abs=1e-3)
    assert s_plot > 0.9
    # at a twist on the S-curve's grid the agreement is exact (float32 spectra)
    grid = d["twist_grid_deg"]
    for sense in (True, False):
        k = int(np.argmax(d["s_curve"][sense]))
        r2 = dict(zip(row.colnames, row))
        r2.update(twist_deg=float(grid[k]), flip=sense)
        d2 = twinring.candidate_profiles(prep, r2)
        assert d2["s_profiles"] == pytest.approx(d["s_curve"][sense][k], abs=2e-5)
    # the second panel shows both senses, the chosen one peaking near the reported s at the reported twist
    curves = figs[0].axes[1].get_lines()
    assert len(curves) >= 2
    s_true = curves[1].get_ydata()
    assert float(np.max(s_true)) == pytest.approx(float(row["s"]), abs=2e-3)


def test_twist_printed_and_tabulated_in_0_360():
    # floating point: x % 360 is exactly 360.0 for a tiny negative x, and 359.97 prints as "360.0"
    assert (-1e-20) % 360.0 == 360.0
    assert rings.wrap_twist_deg(-1e-20) == 0.0
    assert rings.format_twist(359.97) == "0.0" and rings.format_twist(359.94) == "359.9"
    assert rings.format_twist(-0.04) == "0.0" and rings.format_twist(720.5) == "0.5"
    w = rings.wrap_twist_deg(np.array([-1e-20, 359.9999996, 360.0, 725.0, -90.0]), 6)
    assert np.all((w >= 0) & (w < 360)) and list(w) == [0.0, 0.0, 0.0, 5.0, 270.0]
    # the search's closing line
    cand = Table({"s": [0.9], "radius_deg": [60.0], "lon1_deg": [120.0], "lat1_deg": [0.0], "lon2_deg": [300.0],
                  "lat2_deg": [0.0], "twist_deg": [359.97], "flip": [True]})

    class _Pool:
        pairs_scanned = 10

    class _Plan:
        radii_deg = (60.0,)

    line = stages.summary_lines(cand, _Pool(), _Plan())[0]
    assert "twist 0.0 deg" in line and "360.0" not in line
    # summary.json keeps 6 significant digits: 359.97 stays, 359.9999999 (which would round to 360) is 0
    assert report._row_dict(cand[0], ("twist_deg",))["twist_deg"] == 359.97
    cand["twist_deg"] = 359.9999999
    assert report._row_dict(cand[0], ("twist_deg",))["twist_deg"] == 0.0
