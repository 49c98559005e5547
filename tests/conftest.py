"""Shared test fixtures.

The skies here are built inside the tests, independently of pipeline/topology:
a periodic Gaussian field (Sachs-Wolfe, Phi with P(k) ~ k^-3, n_s = 1) on a
3-torus, evaluated on the unit sphere (last-scattering distance chi = 1).
A torus of side L shows matched circles at cos(alpha) = L/2 (faces) and
L sqrt(2)/2 (edges) (Cornish, Spergel & Starkman 1998, CQG 15, 2657).
"""
from __future__ import annotations

import os
import types

os.environ.setdefault("OMP_NUM_THREADS", "1")   # as the command line does (pipeline/cli.py)

import numpy as np
import healpy as hp
import finufft
import pytest


def periodic_field_on_sphere(lengths, nside, kmax, seed, rotation=None, observer=(0, 0, 0), half_turn=False):
    """A Gaussian field with period ``lengths`` along x, y, z evaluated on the unit sphere.

    ``half_turn``: make the field also invariant under (x, y, z) -> (-x, -y, z + c),
    with c = lengths[2] / 2 (the E2 half-turn space, cover torus period 2c).
    """
    rng = np.random.default_rng(seed)
    L = np.asarray(lengths, float)
    n = [int(np.floor(kmax * L[d] / (2 * np.pi))) for d in range(3)]
    g = [np.arange(-n[d], n[d] + 1) for d in range(3)]
    nx, ny, nz = np.meshgrid(*g, indexing="ij")
    kx, ky, kz = 2 * np.pi * nx / L[0], 2 * np.pi * ny / L[1], 2 * np.pi * nz / L[2]
    k = np.sqrt(kx**2 + ky**2 + kz**2)
    amp = np.where((k > 0) & (k <= kmax), np.maximum(k, 1e-30) ** -1.5, 0.0)
    c = (rng.normal(size=k.shape) + 1j * rng.normal(size=k.shape)) * amp
    c = 0.5 * (c + np.conj(c[::-1, ::-1, ::-1]))          # real field
    if half_turn:
        # C_k + C_{Rk} e^{i Rk . t}, R = diag(-1, -1, 1), t = (0, 0, c)
        rot = c[::-1, ::-1, :] * np.exp(1j * kz * (L[2] / 2))
        c = c + rot
    npix = hp.nside2npix(nside)
    v = np.stack(hp.pix2vec(nside, np.arange(npix)), -1)
    if rotation is not None:
        v = v @ np.asarray(rotation).T
    x = v + np.asarray(observer, float)
    # finufft type 2: f(x_j) = sum_k c_k exp(+i k.x_j), points scaled to [-pi, pi) by the periods
    pts = [np.ascontiguousarray(2 * np.pi * x[:, d] / L[d]) for d in range(3)]
    vals = finufft.nufft3d2(pts[0], pts[1], pts[2], np.ascontiguousarray(c), isign=1, eps=1e-9)
    m = vals.real
    return (m - m.mean()) / m.std() * 30.0     # about 30 uK rms, a typical large-scale CMB level


def prepared_from_map(m, lmax, fwhm_deg, mask=None):
    alm = hp.map2alm(m, lmax=lmax, iter=3)
    alm = hp.almxfl(alm, hp.gauss_beam(np.radians(fwhm_deg), lmax=lmax))
    alm[hp.Alm.getidx(lmax, np.arange(2), 0)] = 0
    alm[hp.Alm.getidx(lmax, 1, 1)] = 0
    return types.SimpleNamespace(alm=alm, lmax=lmax, mask=mask, nside=hp.npix2nside(m.size),
                                 map=hp.alm2map(alm, hp.npix2nside(m.size)))


@pytest.fixture(scope="session")
def torus_sky():
    m = periodic_field_on_sphere((1.2, 1.2, 1.2), 64, kmax=140, seed=11)
    return prepared_from_map(m, 128, 3.0)
