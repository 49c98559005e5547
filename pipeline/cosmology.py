"""Distance to last scattering, CAMB spectra and transfer functions.

Defaults are the Planck 2018 best fit as astropy's ``Planck18`` carries it
(H0 = 67.66, omega_b h^2 = 0.02242, omega_c h^2 = 0.11933, one massive
neutrino of 0.06 eV, N_eff = 3.046, T_CMB = 2.7255 K; tau = 0.0561,
A_s = 2.105e-9, n_s = 0.9665 at k = 0.05/Mpc) and last scattering at
z = 1089.92.  Every function takes the ``cosmology`` config section or None
(the defaults).

Conventions of the transfer functions (checked in tests/test_cosmology.py):
CAMB's ``delta_p_l_k[0]`` is the temperature transfer Delta_l(q) of the
primordial curvature R, in units of dT/T, with

    C_l = T0^2 4 pi  int dln q  Delta^2_R(q) Delta_l(q)^2 ,   Delta^2_R = A_s (q / q_pivot)^(n_s - 1)

and Delta_l(q) -> -j_l(q chi) / 5 on large scales (Sachs-Wolfe, Phi = -3 R / 5).
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass, replace as _replace

import numpy as np

GPC_PER_GLY = 0.306601          # 1 Gly in Gpc (1 pc = 3.26156 ly)


@dataclass(frozen=True)
class _Defaults:
    h0: float = 67.66
    ombh2: float = 0.02242
    omch2: float = 0.11933
    mnu: float = 0.06
    neff: float = 3.046
    tcmb: float = 2.7255
    tau: float = 0.0561
    a_s: float = 2.105e-9
    n_s: float = 0.9665
    pivot_mpc: float = 0.05
    z_ls: float = 1089.92
    omega_k: float = 0.0


def _params(cosmo):
    c = cosmo if cosmo is not None else _Defaults()
    return (float(c.h0), float(c.ombh2), float(c.omch2), float(c.mnu), float(c.neff), float(c.tcmb),
            float(c.tau), float(c.a_s), float(c.n_s), float(c.pivot_mpc), float(c.z_ls),
            float(getattr(c, "omega_k", 0.0)))


def t0_uk(cosmo=None) -> float:
    """CMB temperature in micro-kelvin."""
    return _params(cosmo)[5] * 1e6


def astropy_cosmology(cosmo=None):
    """A Lambda-CDM astropy cosmology with the configured parameters.

    Flat (``FlatLambdaCDM``) when ``omega_k`` is 0; otherwise ``LambdaCDM`` with the same
    physical matter densities and H0, the dark energy density lowered by ``omega_k`` so that
    astropy's own curvature density ``Ok0`` equals ``omega_k``.
    """
    from astropy import units as u
    from astropy.cosmology import FlatLambdaCDM, LambdaCDM

    p = _params(cosmo)
    h0, ombh2, omch2, mnu, neff, tcmb = p[:6]
    omega_k = p[11]
    h = h0 / 100.0
    flat = FlatLambdaCDM(H0=h0, Om0=(ombh2 + omch2) / h**2, Ob0=ombh2 / h**2, Tcmb0=tcmb, Neff=neff,
                         m_nu=[0.0, 0.0, mnu] * u.eV)
    if omega_k == 0.0:
        return flat
    return LambdaCDM(H0=h0, Om0=flat.Om0, Ode0=flat.Ode0 - omega_k, Ob0=flat.Ob0, Tcmb0=tcmb, Neff=neff,
                     m_nu=[0.0, 0.0, mnu] * u.eV)


@functools.lru_cache(maxsize=16)
def _chi_gpc(params):
    from astropy import units as u

    c = _Defaults(*params)
    return float(astropy_cosmology(c).comoving_distance(c.z_ls).to(u.Gpc).value)


def chi_ls_gpc(cosmo=None) -> float:
    """Comoving (line-of-sight) distance to last scattering in Gpc (astropy; curved when omega_k != 0)."""
    return _chi_gpc(_params(cosmo))


C_KM_S = 299792.458             # speed of light, km/s


def curvature_radius_gpc(cosmo=None) -> float:
    """Curvature radius R = c / (H0 sqrt|Omega_k|) in Gpc; infinite when omega_k = 0."""
    p = _params(cosmo)
    if p[11] == 0.0:
        return math.inf
    return C_KM_S / (p[0] * math.sqrt(abs(p[11]))) / 1000.0


def chi_over_r(cosmo=None) -> float:
    """chi / R: the radius of the last-scattering sphere in curvature radii (0 when flat)."""
    r = curvature_radius_gpc(cosmo)
    return 0.0 if math.isinf(r) else chi_ls_gpc(cosmo) / r


def chi_over_r_at(omega_k, cosmo=None) -> float:
    """chi / R at curvature ``omega_k`` (< 0), the other parameters from ``cosmo`` (None: Planck 2018)."""
    ok = float(omega_k)
    if not ok < 0.0:
        raise ValueError(f"omega_k must be negative for a spherical space: found {ok}")
    base = cosmo if cosmo is not None else _Defaults()
    return chi_over_r(_replace(base, omega_k=ok))


def curvature_radius_gpc_at(omega_k, cosmo=None) -> float:
    base = cosmo if cosmo is not None else _Defaults()
    return curvature_radius_gpc(_replace(base, omega_k=float(omega_k)))


def chi_ls_gly(cosmo=None) -> float:
    """The same distance in billions of light years."""
    return chi_ls_gpc(cosmo) / GPC_PER_GLY


# --------------------------------------------------------------------------- CAMB
def camb_params(cosmo=None, lmax=128, max_eta_k=None, k_accuracy=2.0):
    """CAMBparams for the configured cosmology, scalar modes only."""
    import camb

    h0, ombh2, omch2, mnu, neff, tcmb, tau, a_s, n_s, pivot, _, omega_k = _params(cosmo)
    p = camb.CAMBparams()
    p.set_cosmology(H0=h0, ombh2=ombh2, omch2=omch2, mnu=mnu, nnu=neff, tau=tau, TCMB=tcmb, omk=omega_k)
    p.InitPower.set_params(As=a_s, ns=n_s, pivot_scalar=pivot)
    p.set_for_lmax(int(lmax), max_eta_k=max_eta_k, lens_potential_accuracy=0)
    p.WantTensors = False
    p.Accuracy.lSampleBoost = 50          # every l present in the transfer data
    p.Accuracy.IntkAccuracyBoost = k_accuracy
    return p


@functools.lru_cache(maxsize=8)
def _camb_cl(params, lmax, lensed):
    import camb

    c = _Defaults(*params)
    p = camb_params(c, lmax=lmax + 100)
    p.Accuracy.lSampleBoost = 1
    p.Accuracy.IntkAccuracyBoost = 1
    res = camb.get_results(p)
    if lensed:
        cl = res.get_lensed_scalar_cls(CMB_unit="muK", raw_cl=True)[:, 0]
    else:
        cl = res.get_unlensed_scalar_cls(CMB_unit="muK", raw_cl=True)[:, 0]
    out = np.zeros(lmax + 1)
    n = min(lmax + 1, cl.size)
    out[:n] = cl[:n]
    return out


def isotropic_cl(lmax, cosmo=None, lensed=False) -> np.ndarray:
    """TT C_l (uK^2, l = 0..lmax, zero for l < 2) of the configured cosmology from CAMB.

    Unlensed by default, matching the topology skies (which carry no lensing).
    """
    return _camb_cl(_params(cosmo), int(lmax), bool(lensed)).copy()


@dataclass(frozen=True)
class Transfer:
    """Temperature transfer functions Delta_l(q) from CAMB (dT/T per unit curvature R)."""

    q: np.ndarray          # (nq,) 1/Mpc
    ells: np.ndarray       # (nl,) l = 2..lmax, contiguous
    delta: np.ndarray      # (nl, nq)
    chi_mpc: float         # CAMB's comoving distance to z_ls
    a_s: float
    n_s: float
    pivot_mpc: float
    tcmb_uk: float

    def primordial(self, q):
        """Dimensionless curvature power Delta^2_R(q)."""
        return self.a_s * (np.asarray(q) / self.pivot_mpc) ** (self.n_s - 1.0)

    def cl_from_transfer(self, qmax=None):
        """C_l (uK^2) integrated from these transfer functions (a consistency check against CAMB)."""
        sel = slice(None) if qmax is None else self.q <= qmax
        q, d = self.q[sel], self.delta[:, sel]
        return self.tcmb_uk**2 * 4 * np.pi * np.trapezoid(self.primordial(q) * d**2, np.log(q), axis=1)


def scalar_transfer(c, lmax, max_eta_k):
    """CAMB's results and scalar CMB transfer data for cosmology ``c``, with the multipoles
    l = 2..lmax and their rows in the transfer data (CAMB samples l sparsely unless asked not to)."""
    import camb

    res = camb.get_transfer_functions(camb_params(c, lmax=lmax, max_eta_k=max_eta_k))
    td = res.get_cmb_transfer_data("scalar")
    ells = np.asarray(td.L)
    want = np.arange(2, lmax + 1)
    idx = np.searchsorted(ells, want)
    if np.any(idx >= ells.size) or np.any(ells[np.minimum(idx, ells.size - 1)] != want):
        raise RuntimeError(f"CAMB transfer data lack some multipoles up to {lmax}")
    return res, td, want, idx


@functools.lru_cache(maxsize=4)
def _transfer(params, lmax, kmax_chi):
    c = _Defaults(*params)
    res, td, want, idx = scalar_transfer(c, lmax, 1.15 * kmax_chi + 50.0)
    chi = float(res.comoving_radial_distance(c.z_ls))
    return Transfer(q=np.asarray(td.q, float).copy(), ells=want, delta=np.asarray(td.delta_p_l_k[0][idx], float).copy(),
                    chi_mpc=chi, a_s=c.a_s, n_s=c.n_s, pivot_mpc=c.pivot_mpc, tcmb_uk=c.tcmb * 1e6)


def transfer_functions(lmax, kmax_chi, cosmo=None) -> Transfer:
    """CAMB temperature transfer functions for l = 2..lmax covering |k| chi up to ``kmax_chi``."""
    t = _transfer(_params(cosmo), int(lmax), float(math.ceil(kmax_chi)))
    if t.q.max() * t.chi_mpc < kmax_chi:
        raise RuntimeError(f"CAMB q range ends at k chi = {t.q.max() * t.chi_mpc:.0f} < {kmax_chi:.0f}")
    return t


def camb_chi_mpc(cosmo=None) -> float:
    """CAMB's comoving distance to z_ls in Mpc (background only)."""
    return _camb_chi(_params(cosmo))


@functools.lru_cache(maxsize=8)
def _camb_chi(params):
    import camb

    c = _Defaults(*params)
    p = camb_params(c, lmax=100)
    bg = camb.get_background(p)
    return float(bg.comoving_radial_distance(c.z_ls))
