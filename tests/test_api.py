"""The public API: the README's notebook example runs, and the functions agree with the outside world."""
import contextlib
import io
import math
import re
from pathlib import Path

import healpy as hp
import numpy as np
import pytest

import twinring
from twinring.config import InputError

README = Path(__file__).resolve().parents[1] / "README.md"


def _api_example():
    text = README.read_text()
    section = text.split("## Python API", 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```python\n(.*?)```", section, flags=re.S)
    assert len(blocks) == 1
    return blocks[0]


def test_readme_example_runs(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    out = io.StringIO()
    scope = {}
    with contextlib.redirect_stdout(out):
        exec(compile(_api_example(), "README.md (Python API)", "exec"), scope)
    # cubic torus of side 1.2 chi: face pairs at cos a = 0.6, twist 0, flip true (Cornish, Spergel & Starkman 1998)
    face = scope["face"]
    assert face["radius_deg"] == pytest.approx(math.degrees(math.acos(0.6)), abs=1e-6)
    best = scope["curve"]["best"]
    assert best["flip"] is True and min(best["twist_deg"], 360 - best["twist_deg"]) < 2.0 and best["s"] > 0.9
    # the candidate's plotted profiles correlate to its reported S (twist interpolated by the search)
    assert scope["prof"]["s_profiles"] == pytest.approx(float(scope["cand"]["s"][0]), abs=1e-3)
    values, valid = scope["values"], scope["valid"]
    assert values.shape[0] == 2 and valid.all()
    assert len(scope["run"]["circles"]) == 9 and "9 E1" in out.getvalue()


def test_sample_rings_equal_the_harmonic_sum_at_the_circle_points():
    # T(theta, phi) = sum_lm a_lm Y_lm with scipy's spherical harmonics (scipy.special.sph_harm_y), at the
    # points of a circle of radius 30 deg about the north pole: phase origin +x, phase = longitude
    # (rings.py: centres within 5 deg of a pole take +x as reference)
    import scipy.special

    nside, lmax = 16, 12
    alm = hp.synalm(np.ones(lmax + 1) * 100.0, lmax=lmax, new=True)
    m = hp.alm2map(alm, nside, lmax=lmax)
    prepared = twinring.prepare_map(m, nside=nside, lmax=lmax, fwhm_deg=0.0, remove_dipole=False, lmin=0)
    vals, valid = twinring.sample_rings(prepared, 0.0, 90.0, 30.0, nsamp=16)
    theta = np.radians(30.0)
    phi = 2 * np.pi * np.arange(16) / 16
    ref = np.zeros(16)
    for ell in range(lmax + 1):
        for mm in range(ell + 1):
            a = prepared.alm[hp.Alm.getidx(lmax, ell, mm)]
            y = scipy.special.sph_harm_y(ell, mm, theta, phi)
            ref += np.real(a * y) * (1 if mm == 0 else 2)
    assert valid.all()
    assert np.allclose(vals[0], ref, atol=1e-6 * np.abs(ref).max())


def test_bad_options_name_the_key():
    with pytest.raises(InputError, match=r"prepare\.nside: found 30; allowed: a power of two"):
        twinring.prepare_map(np.zeros(hp.nside2npix(8)), nside=30)
    with pytest.raises(InputError, match=r"search\.top: unknown key|search\.tpo: unknown key \(did you mean 'top'"):
        twinring.search_map(None, tpo=3)
    with pytest.raises(InputError, match="HEALPix RING map"):
        twinring.prepare_map(np.zeros(100))
    with pytest.raises(InputError, match="run directory not found"):
        twinring.read_run("/nonexistent/run")
