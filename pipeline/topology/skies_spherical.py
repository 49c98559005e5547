"""Gamma-invariant Sachs-Wolfe skies of spherical spaces S^3 / Gamma.

Field
    The Newtonian potential Phi on S^3 (curvature radius R) is a Gaussian field
    with correlation function

        xi(r) = sum_{n >= 3} w_n U_{n-1}(cos r),   U_{n-1}(cos r) = sin(n r) / sin r,

    where n = 1, 2, ... labels the eigenspaces of the Laplacian (eigenvalue
    -(n^2 - 1)/R^2, dimension n^2), w_n = Delta^2_Phi(k_n) / (n^2 - 1) with
    k_n = sqrt(n^2 - 1) / R and Delta^2_Phi = (9/25) A_s (k / k_pivot)^(n_s - 1)
    (so that sum_n w_n n tends to int dln k Delta^2_Phi, the flat value).  n = 1
    (a constant) and n = 2 (gauge modes of a closed universe) are left out.  On
    S^3 / Gamma the field is the Gamma-invariant part, with covariance
    C_Gamma(x, y) = sum_g xi(d(x, g y)) (each n separately).

Sampler (exact for that covariance, truncated at n_max)
    Per n, the invariant subspace V_n^Gamma has dimension
    k_n = (1/|Gamma|) sum_g U_{n-1}(Re a_g) U_{n-1}(Re b_g) (the character of
    x -> a x conj(b) on V_n is the product of two SU(2) characters).  The
    functions F_u(x) = sum_g U_{n-1}(<x, g u>) are invariant, and for K >= k_n
    random centres u_1..u_K they span V_n^Gamma; with G_ij = F_{u_j}(u_i) and
    beta ~ N(0, w_n G^+) the field f_n = sum_i beta_i F_{u_i} has exactly the
    covariance w_n sum_g U_{n-1}(<x, g y>) (reproducing kernel of V_n^Gamma).
    Summing over n with shared centres, f(x) = sum_i sum_g h_i(<x, g u_i>) with
    h_i(cos t) = sum_n beta_{n,i} sin(n t) / sin t, tabulated in t and
    interpolated.  Whatever h_i is, f is exactly Gamma-invariant (the orbit
    {g u_i} is permuted by Gamma), so the tabulation only perturbs the spectrum
    (relative error about (pi / TABLE_PER_N)^2 / 8).

Sky
    The sky is f on the last-scattering sphere, dT = T0 Phi / 3, evaluated on a
    Gauss-Legendre grid exact for its band limit (the restriction of a degree
    n_max - 1 polynomial of R^4 to the sphere has l <= n_max - 1), analysed to
    lmax, beamed and synthesised on HEALPix.  n_max = ceil(kmax_factor * lmax /
    sin(chi/R)) + 1: a mode n projects to l ~ n sin(chi/R).

Cost and limits
    Centres K = max_n k_n + margin ~ n_max^2 / |Gamma|; building G costs
    sum_n K_n^2 |Gamma| and its eigen-decomposition sum_n K_n^3 ~ n_max^7 /
    (7 |Gamma|^3); evaluation costs N_grid K |Gamma| ~ lmax n_max^3 table
    look-ups, independent of |Gamma|.  Measured here (Nside 32, lmax 64,
    chi/R = 0.71): I* a few seconds; L(8,1) about a minute.  Small groups
    (|Gamma| < 8) at lmax 64 need thousands of centres per n and are refused by
    ``MAX_CENTRES``.  Sachs-Wolfe only: no Doppler, ISW or thickness of last
    scattering; no n_s-dependent transfer in curved space.
"""
from __future__ import annotations

import math

import numpy as np

from .spherical import SphericalSpace, qconj, qmul

TABLE_PER_N = 64          # table points per unit n over [0, pi]
MAX_CENTRES = 3000
MARGIN = 8


def cheb_u(n, cos_t):
    """U_{n-1}(cos t) = sin(n t) / sin t, with its limits n and (-1)^(n-1) n at t = 0, pi."""
    c = np.clip(np.asarray(cos_t, float), -1.0, 1.0)
    t = np.arccos(c)
    s = np.sin(t)
    small = s < 1e-12
    out = np.sin(n * t) / np.where(small, 1.0, s)
    return np.where(small, np.where(c > 0, n, n * (-1.0) ** (n - 1)), out)


def invariant_dimension(space: SphericalSpace, n: int) -> int:
    """k_n: dimension of the Gamma-invariant eigenfunctions with eigenvalue n^2 - 1 (character formula)."""
    a = np.array([g.a[0] for g in space.elements])
    b = np.array([g.b[0] for g in space.elements])
    val = float(np.sum(cheb_u(n, a) * cheb_u(n, b))) / space.order
    k = int(round(val))
    if abs(val - k) > 1e-6:
        raise RuntimeError(f"character sum for n = {n} is not an integer ({val})")
    return k


def n_max_for(space: SphericalSpace, lmax, kmax_factor=1.0):
    return int(math.ceil(kmax_factor * lmax / math.sin(space.chi_over_r))) + 1


def phi_weights(ns, r_mpc, a_s=2.105e-9, n_s=0.9665, pivot_mpc=0.05):
    """w_n = Delta^2_Phi(k_n) / (n^2 - 1), k_n = sqrt(n^2 - 1) / R (per Mpc)."""
    ns = np.asarray(ns, float)
    k = np.sqrt(ns**2 - 1.0) / r_mpc
    return (9.0 / 25.0) * a_s * (k / pivot_mpc) ** (n_s - 1.0) / (ns**2 - 1.0)


def xi(r, ns, weights):
    """The S^3 correlation function sum_n w_n U_{n-1}(cos r)."""
    return sum(w * cheb_u(n, np.cos(r)) for n, w in zip(ns, weights))


def _orbits(space: SphericalSpace, u):
    """g(u_i) for every element: (K, |Gamma|, 4)."""
    a = np.array([g.a for g in space.elements])
    bc = qconj(np.array([g.b for g in space.elements]))
    return qmul(qmul(a[None], u[:, None, :]), bc[None])


def invariant_coefficients(space: SphericalSpace, n_max, rng, weights_of_n):
    """(centres (K, 4), orbits (K, |Gamma|, 4), beta (n_max + 1, K), dims {n: k_n}) of one realisation."""
    dims = {n: invariant_dimension(space, n) for n in range(3, n_max + 1)}
    dims = {n: k for n, k in dims.items() if k > 0}
    if not dims:
        return np.zeros((0, 4)), np.zeros((0, space.order, 4)), np.zeros((n_max + 1, 0)), dims
    K = max(dims.values()) + MARGIN
    if K > MAX_CENTRES:
        raise ValueError(f"{K} centres needed (more than {MAX_CENTRES}): lower lmax or choose a larger group")
    u = rng.standard_normal((K, 4))
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    orb = _orbits(space, u)
    beta = np.zeros((n_max + 1, K))
    t = np.clip((u @ orb.reshape(-1, 4).T).reshape(K, K, space.order), -1.0, 1.0)    # <u_i, g u_j>
    u_prev, u_cur = np.zeros_like(t), np.ones_like(t)                                # U_{-1}, U_0
    for n in range(1, n_max + 1):
        if n > 1:                                                                    # U_{n-1} = 2t U_{n-2} - U_{n-3}
            u_prev, u_cur = u_cur, 2.0 * t * u_cur - u_prev
        k = dims.get(n, 0)
        if k == 0:
            continue
        kn = min(K, k + MARGIN)
        G = u_cur[:kn, :kn].sum(axis=2)
        G = 0.5 * (G + G.T)
        lam, V = np.linalg.eigh(G)
        lam, V = lam[::-1][:k], V[:, ::-1][:, :k]
        if lam[-1] <= 1e-9 * lam[0]:
            raise RuntimeError(f"invariant functions for n = {n} are not spanned by {kn} centres")
        z = rng.standard_normal(k)
        beta[n, :kn] = math.sqrt(weights_of_n(n)) * (V @ (z / np.sqrt(lam)))
    return u, orb, beta, dims


def field_at(orb, beta, points, block=2):
    """f(x) = sum_i sum_g h_i(<x, g u_i>) at unit quaternions ``points`` (P, 4)."""
    n_max = beta.shape[0] - 1
    K = orb.shape[0]
    P = points.shape[0]
    out = np.zeros(P)
    if K == 0:
        return out
    M = TABLE_PER_N * n_max
    tgrid = np.linspace(0.0, np.pi, M + 1)
    ns = np.arange(n_max + 1)
    s = np.sin(tgrid)
    num = beta.T @ np.sin(np.outer(ns, tgrid))                          # (K, M + 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        h = num / np.where(s > 0, s, 1.0)
    h[:, 0] = beta.T @ ns
    h[:, -1] = beta.T @ (ns * (-1.0) ** (ns - 1))
    step = np.pi / M
    hflat = h.ravel()
    nG = orb.shape[1]
    for i0 in range(0, K, block):
        i1 = min(K, i0 + block)
        t = points @ orb[i0:i1].reshape(-1, 4).T                        # (P, B * |Gamma|)
        x = np.arccos(np.clip(t, -1.0, 1.0)) / step
        j = np.minimum(x.astype(np.int64), M - 1)
        fr = x - j
        base = (np.repeat(np.arange(i0, i1), nG) * (M + 1))[None, :]
        v = hflat[base + j] * (1.0 - fr) + hflat[base + j + 1] * fr
        out += v.sum(axis=1)
    return out


def sw_alm(space: SphericalSpace, lmax, rng, t0_uk, r_mpc, a_s=2.105e-9, n_s=0.9665, pivot_mpc=0.05,
           kmax_factor=1.0, nthreads=1):
    """a_lm (uK, healpy order, l <= lmax) of dT = T0 Phi / 3 on the last-scattering sphere; and info."""
    import ducc0

    from .skies import gl_grid

    n_max = n_max_for(space, lmax, kmax_factor)
    u, orb, beta, dims = invariant_coefficients(
        space, n_max, rng, lambda n: float(phi_weights(n, r_mpc, a_s, n_s, pivot_mpc)))
    ntheta, nphi = gl_grid(lmax, n_max - 1)
    x, _ = np.polynomial.legendre.leggauss(ntheta)
    theta = np.arccos(x[::-1])
    phi = 2 * np.pi * np.arange(nphi) / nphi
    st, ct = np.sin(theta), np.cos(theta)
    v = np.stack([st[:, None] * np.cos(phi)[None, :], st[:, None] * np.sin(phi)[None, :],
                  np.broadcast_to(ct[:, None], (ntheta, nphi))], axis=-1).reshape(-1, 3)
    pts = space.point(v, space.chi_over_r)
    m = (t0_uk / 3.0) * field_at(orb, beta, pts)
    alm = ducc0.sht.experimental.analysis_2d(map=m.reshape(1, ntheta, nphi), spin=0, lmax=lmax, geometry="GL",
                                             nthreads=max(1, nthreads))[0]
    info = {"n_max": n_max, "centres": int(u.shape[0]), "invariant_modes": int(sum(k for k in dims.values())),
            "first_n": min(dims) if dims else None}
    return alm, info


def make_sky(space: SphericalSpace, nside=32, lmax=64, fwhm_deg=3.0, seed=5, noise_uk_arcmin=0.0, lmin=2,
             kmax_factor=1.0, cosmo=None, nthreads=1, return_info=False):
    """HEALPix RING map (uK) of a Gamma-invariant Sachs-Wolfe sky; seeds as twinring.topology.skies.make_sky."""
    import healpy as hp

    from .. import cosmology
    from .skies import noise_map

    p = cosmology._params(cosmo)
    a_s, n_s, pivot = p[7], p[8], p[9]
    r_mpc = cosmology.curvature_radius_gpc(cosmo) * 1000.0
    if not math.isfinite(r_mpc):
        r_mpc = cosmology.chi_ls_gpc(cosmo) * 1000.0 / space.chi_over_r
    ss_modes, ss_noise, _ = np.random.SeedSequence(seed).spawn(3)
    alm, info = sw_alm(space, lmax, np.random.default_rng(ss_modes), cosmology.t0_uk(cosmo), r_mpc, a_s, n_s,
                       pivot, kmax_factor, nthreads)
    l_of = hp.Alm.getlm(lmax)[0]
    alm[l_of < lmin] = 0.0
    if fwhm_deg > 0:
        alm = hp.almxfl(alm, hp.gauss_beam(np.radians(fwhm_deg), lmax=lmax))
    m = hp.alm2map(alm, nside, lmax=lmax)
    m = m + noise_map(nside, noise_uk_arcmin, np.random.default_rng(ss_noise))
    return (m, info) if return_info else m


def check_centres(space: SphericalSpace, lmax, kmax_factor=1.0):
    """Raise ValueError when a sky at this lmax would need more than MAX_CENTRES centres (before any work)."""
    n_max = n_max_for(space, lmax, kmax_factor)
    dims = [invariant_dimension(space, n) for n in range(3, n_max + 1)]
    K = max(dims, default=0) + MARGIN
    if K > MAX_CENTRES:
        raise ValueError(f"{K} centres needed (more than {MAX_CENTRES}): lower lmax or choose a larger group")
    return K
