"""Distance to last scattering, CAMB spectra and transfer functions (pipeline/cosmology.py)."""
from __future__ import annotations

import types

import numpy as np
import pytest
from scipy.special import spherical_jn

from twinring import cosmology


def test_chi_default_matches_astropy_planck18():
    # Reference: astropy's built-in Planck18 cosmology at z = 1089.92.
    from astropy.cosmology import Planck18
    from astropy import units as u

    ref = Planck18.comoving_distance(1089.92).to(u.Gpc).value
    assert cosmology.chi_ls_gpc() == pytest.approx(ref, rel=1e-4)


def test_chi_agrees_with_camb_and_planck_2018():
    chi = cosmology.chi_ls_gpc()
    # CAMB (an independent Boltzmann/background code) with the same parameters.
    assert chi == pytest.approx(cosmology.camb_chi_mpc() / 1000.0, rel=5e-3)
    # Planck 2018 VI (A&A 641, A6): r* = 144.4 Mpc, 100 theta* = 1.0411 -> D_M = 13.87 Gpc (from memory).
    assert chi == pytest.approx(0.1444 / 0.010411, rel=5e-3)
    assert chi == pytest.approx(13.87, rel=5e-3)
    # About 45 billion light years (common practice, no source).
    assert cosmology.chi_ls_gly() == pytest.approx(45.0, rel=0.03)


def test_chi_follows_configured_parameters():
    # A different cosmology: astropy and CAMB, two independent codes, must still agree, and the distance
    # must move away from the default (the parameters are used).
    c = types.SimpleNamespace(h0=72.0, ombh2=0.0222, omch2=0.110, mnu=0.06, neff=3.046, tcmb=2.7255,
                              tau=0.06, a_s=2.1e-9, n_s=0.965, pivot_mpc=0.05, z_ls=1090.0)
    chi = cosmology.chi_ls_gpc(c)
    assert chi == pytest.approx(cosmology.camb_chi_mpc(c) / 1000.0, rel=2e-3)
    assert abs(chi - cosmology.chi_ls_gpc()) > 0.05


def test_isotropic_cl_shape():
    cl = cosmology.isotropic_cl(300)
    ell = np.arange(cl.size)
    dl = ell * (ell + 1) * cl / (2 * np.pi)
    assert cl[0] == 0 and cl[1] == 0
    # Sachs & Wolfe 1967 (ApJ 147, 73): nearly flat l(l+1)C_l at low l, about 1000 uK^2 for Planck 2018
    # parameters (from memory).
    assert 600 < np.mean(dl[10:20]) < 1400
    assert np.std(dl[10:20]) / np.mean(dl[10:20]) < 0.15
    # First acoustic peak near l = 220 with D_l about 5700 uK^2 (Planck 2018 I, from memory).
    peak = int(np.argmax(dl[50:]) + 50)
    assert 200 <= peak <= 235
    assert 5000 < dl[peak] < 6500
    lensed = cosmology.isotropic_cl(300, lensed=True)
    assert np.allclose(lensed[2:200], cl[2:200], rtol=0.03)     # lensing matters little at l < 200


def test_transfer_functions_reproduce_camb_cl_and_sachs_wolfe_limit():
    tr = cosmology.transfer_functions(128, 256)
    assert np.array_equal(tr.ells, np.arange(2, 129))
    assert tr.q.max() * tr.chi_mpc >= 256
    # The documented normalisation: C_l = T0^2 4 pi int dln q Delta_R^2 Delta_l^2 equals CAMB's own C_l.
    cl = cosmology.isotropic_cl(128)
    ratio = tr.cl_from_transfer() / cl[2:]
    assert np.all(np.abs(ratio - 1) < 0.01)
    # Large scales: Delta_l(q) -> -j_l(q chi)/5 (Sachs-Wolfe, Phi = -3R/5; from memory), sign included.
    for ell in (2, 4):
        q = tr.q[tr.q * tr.chi_mpc < ell + 6]
        d = tr.delta[ell - 2, : q.size]
        j = -spherical_jn(ell, q * tr.chi_mpc) / 5
        corr = np.sum(d * j) / np.sqrt(np.sum(d * d) * np.sum(j * j))
        assert corr > 0.9
        assert 0.7 < np.max(np.abs(d)) / np.max(np.abs(j)) < 1.1
