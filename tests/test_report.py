"""Report: figures from a run directory's tables, summary.md and summary.json."""
from __future__ import annotations

import json
import math

import numpy as np
import healpy as hp
import pytest
import scipy.stats
from astropy.table import Table
from matplotlib.image import imread

from twinring import bound, calibrate as cal, inject, report
from twinring.prepare import Prepared, write_prepared
from twinring.results import write_table

RADII = np.arange(20.0, 81.0, 10.0)


def fake_run(d, with_bound=True, with_calibration=True):
    """A run directory with tables of the right shape (values drawn from known laws)."""
    rng = np.random.default_rng(4)
    n = 30
    # null maxima: Gumbel with a location falling with radius (common practice: more samples, smaller maxima)
    loc = 0.75 - 0.003 * (RADII - 20)
    peaks_null = scipy.stats.gumbel_r(loc[None, :, None], 0.03).rvs(size=(n, RADII.size, 2), random_state=rng)
    model = cal.NullModel(RADII, peaks_null)
    data = model.mu + 0.5 * model.sigma
    data[2, 1] = model.mu[2, 1] + 8 * model.sigma[2, 1]         # a strong pair at 40 deg, flip true
    peaks = Table({"radius_deg": np.repeat(RADII, 2), "flip": np.tile([False, True], RADII.size),
                   "s": data.ravel()})
    cand = Table({"rank": [1, 2], "radius_deg": [40.3, 20.0], "lon1_deg": [10.0, 200.0], "lat1_deg": [30.0, -10.0],
                  "lon2_deg": [190.0, 20.0], "lat2_deg": [-30.0, 10.0], "separation_deg": [180.0, 180.0],
                  "twist_deg": [0.0, 12.0], "flip": [True, False], "s": [0.95, 0.80], "s_grid": [data[2, 1], 0.78]})
    if with_calibration:
        peaks = cal.annotate(peaks, model, "s")
        cand = cal.annotate(cand, model)
        write_table(model.thresholds_table([0.01, 0.05]), d / "thresholds.ecsv", model.meta([0.01, 0.05]))
        write_table(model.null_table(), d / "null_peaks.ecsv", model.meta([0.01]))
    write_table(peaks, d / "peaks.ecsv")
    write_table(cand, d / "candidates.ecsv")
    nside, lmax = 16, 32
    alm = hp.map2alm(rng.normal(size=hp.nside2npix(nside)) * 30, lmax=lmax)
    m = hp.alm2map(alm, nside, lmax=lmax)
    mask = (np.abs(hp.pix2vec(nside, np.arange(m.size))[2]) > 0.2).astype(float)
    write_prepared(Prepared(alm=alm, lmax=lmax, nside=nside, map=m, mask=mask, fwhm_deg=3.0), d)
    if with_bound:
        rows = [dict(size_index=i, realization=j, size_chi=2 * math.cos(math.radians(r)), radius_deg=r, n_targets=3,
                     flip=True, s=0.9, s_threshold=0.8, radius_found_deg=r, in_range=True, detected=(r >= 45 or j == 0))
                for i, r in enumerate((30.0, 50.0, 70.0)) for j in range(4)]
        rec = inject.recovery_table(inject.injections_table(rows))
        write_table(rec, d / "recovery.ecsv", {"space": "E1", "shape_lengths": [1.0, 1.0, 1.0], "mode": "targeted",
                                               "threshold": "global", "false_alarm": 0.01, "distance_per_size": 1.0})
        row = bound.bound_row(rec, 0.95, 0.01, [], 2.0, 1.0, 13.9, "cubic three-torus (E1)", point_fraction=True)
        write_table(bound.bound_table(row), d / "bound.ecsv")
    return model, peaks, cand


def test_report_draws_four_figures_and_a_summary(tmp_path):
    model, peaks, cand = fake_run(tmp_path)
    s = report.make_report(tmp_path)
    names = sorted(p.split("/")[-1] for p in s["figures"])
    assert names == sorted(report.FIGURES)
    for f in report.FIGURES:
        img = imread(tmp_path / f)
        assert img.shape[0] > 300 and img.shape[1] > 500
        assert np.std(img[..., :3]) > 0.05                # not a blank canvas
    # the headline is the bound's sentence; alpha_min = 50 deg -> L > 2 cos 50 deg chi (CSS 1998 geometry)
    assert s["bound"]["alpha_min_deg"] == 50.0
    assert s["bound"]["size_gpc"] == pytest.approx(2 * 13.9 * math.cos(math.radians(50.0)), rel=1e-4)
    assert s["headline"] == s["bound"]["statement"]
    again = json.loads((tmp_path / "summary.json").read_text())
    assert again["headline"] == s["headline"]
    # the most significant entries are the injected 8-sigma pair
    assert again["most_significant_peak"]["radius_deg"] == 40.0 and again["most_significant_peak"]["flip"] is True
    assert again["most_significant_peak"]["p_global"] == pytest.approx(float(np.min(peaks["p_global"])), rel=1e-4)
    assert again["most_significant_candidate"]["rank"] == 1
    md = (tmp_path / "summary.md").read_text()
    assert s["headline"] in md and "| 30.0 | 1.732 | 1/4 |" in md and "![fig_null](fig_null.png)" in md


def test_headline_without_bound_or_calibration(tmp_path):
    a = tmp_path / "a"
    a.mkdir()
    fake_run(a, with_bound=False)
    s = report.make_report(a)
    assert s["headline"].startswith("Most significant circle pair") and "significant" in s["headline"]
    assert sorted(p.split("/")[-1] for p in s["figures"]) == ["fig_map.png", "fig_null.png", "fig_peaks.png"]
    b = tmp_path / "b"
    b.mkdir()
    fake_run(b, with_bound=False, with_calibration=False)
    s = report.make_report(b)
    assert "not calibrated" in s["headline"]
    assert sorted(p.split("/")[-1] for p in s["figures"]) == ["fig_map.png", "fig_peaks.png"]
