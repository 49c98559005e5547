"""Gaussian random fields invariant under the group, and the skies they make.

The potential Phi is a real Gaussian field on a cover torus with lattice L
(columns), f(x) = sum_k c_k exp(i k.x), k = 2 pi L^-T n, n integer,
<|c_k|^2> = P_Phi(k) / V with P_Phi(k) = 2 pi^2 (9/25) A_s (k/k_pivot)^(n_s-1) / k^3.
For a holonomy representative h(x) = R_h x + t_h of every rotation part,
f_G(x) = |H|^-1/2 sum_h f(h x), i.e. C_k = |H|^-1/2 sum_h c_{R_h k} exp(i (R_h k).t_h),
is invariant under the whole group (MATH.md section 5); the |H|^-1/2 keeps the
per-mode variance of the quotient equal to that of the cover torus.

Non-compact directions (chimneys, slabs, E18) are stood in for by a period
``open_length`` (chi units) along them, long enough that it adds no circle
pair (checked: every element of the stood-in group within reach of a circle
must be an element of the true group).

``physics="sw"``: dT = T0 Phi / 3 on the sphere |x - x0| = chi, evaluated with
a 3-D type-2 non-uniform FFT (finufft) on a Gauss-Legendre grid fine enough
for an exact harmonic analysis up to lmax.
``physics="full"``: a_lm = 4 pi T0 i^l sum_k R_k exp(i k.x0) Delta_l(|k|) Y*_lm(k^)
with R = -5 Phi / 3 and Delta_l CAMB's temperature transfer functions (which
tend to -j_l(k chi)/5 on large scales, so the two physics agree there).  Each
mode is spread over the four nearest nodes of CAMB's q grid (cubic Lagrange
weights); per node, one adjoint spherical-harmonic transform of point weights.

Mode cut (``mode_cut``).  A sky keeps the modes with |k| chi <= kmax; the
modes beyond still carry part of every C_l = int P(k) Delta_l(k)^2 dk (for
sw, Delta_l = j_l(k chi), whose tail falls only as 1/(2 (k chi)^2); for full
physics the Doppler term's tail is heavier).  The old fixed cut kmax = 2 lmax
lost 12 % (sw) and 34-40 % (full) of C_l near lmax.  Now, by default
(``kmax_factor`` None), kmax is the smallest |k| chi >= lmax at which the
omitted part is at most ``TAIL_TOLERANCE`` (15 %) of C_l for every
2 <= l <= lmax, computed from the same Delta_l the sky uses (sw: scipy's
spherical_jn against the closed-form total; full: CAMB's transfer functions
to 8 lmax plus a 1/k^2 tail), and the remainder is put back by scaling each
a_lm by 1/sqrt(kept fraction of C_l), so band powers have the isotropic
expectation at every l <= lmax.  The scaling gives the omitted power the
kept modes' mixture of Sachs-Wolfe, Doppler and ISW terms and their
matching on circles; the tolerance bounds how much power is so
approximated.  An explicit ``kmax_factor`` sets the cut (still corrected);
``correct_tail=False`` turns the correction off.
Measured on E1 of side 4 chi, lmax 64 (mean of 4 skies, bands of 8 l): full
physics / CAMB 0.82, 0.79, 0.71, 0.66 at l 34-41, 42-49, 50-57, 58-64 before,
1.01, 0.99, 0.97, 1.02 after; sw / SW integral 0.92, 0.85 at l 50-57, 58-64
before, 1.02, 0.97 after (tests/test_topology_skies.py).
Resulting cuts (Planck 2018): sw kmax = 1.9 lmax for any lmax; full
kmax = 4.0 lmax at lmax 32, 3.0 at lmax 64, 2.0 at lmax 128.
Cost, E1 at lmax 64, Nside 64, one sky (CPU seconds of the process, which the
shared test machine measures more steadily than wall time; peak resident
memory of the whole process), old fixed cut -> automatic cut:
  side 1.2 chi, sw:   0.07 s -> 0.06 s,  171 MB -> 170 MB   (61 k -> 52 k modes)
  side 1.2 chi, full: 0.07 s -> 0.19 s,  195 MB -> 222 MB   (61 k -> 211 k modes)
  side 4 chi,   sw:   0.49 s -> 0.53 s,  595 MB -> 508 MB   (2.27 M -> 1.94 M modes)
  side 4 chi,   full: 1.2 s  -> 6.4 s,   714 MB -> 1.85 GB  (2.27 M -> 7.8 M modes)
plus, once per process, CAMB's transfer functions (about 1 s CPU, to 8 lmax
now instead of 2 lmax: no measurable change) and the sw table (0.03 s at
lmax 64, 0.25 s at lmax 128).  At lmax 128 full physics keeps kmax = 2 lmax,
so its cost is unchanged there.

Maps are in uK, HEALPix RING.  Random numbers: SeedSequence(seed).spawn(3) ->
(modes, noise, mask).
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
import healpy as hp

from .manifolds import Space, Isometry, elements_within, lattice_points_within

SQUARE_TWISTS = (1, 2, 4)
HEX_TWISTS = (3, 6)
PHYSICS = ("sw", "full")
L_MARGIN = 30          # j_l(k chi) is negligible for l > k chi + this
TAIL_TOLERANCE = 0.15  # automatic cut: at most this fraction of any C_l (l <= lmax) lies beyond kmax
REF_FACTOR = 8.0       # reference integrals run to |k| chi = REF_FACTOR * lmax, plus a 1/k^2 tail
SW_DX = 0.1            # quadrature step in k chi of the Sachs-Wolfe integral


class SkyParamError(ValueError):
    def __init__(self, key, found, allowed):
        super().__init__(f"{key}: found {found!r}; allowed: {allowed}")
        self.key, self.found, self.allowed = key, found, allowed


# --------------------------------------------------------------------------- lattice and modes
def sky_lattice(space: Space, open_length=4.0) -> np.ndarray:
    """3x3 lattice (columns) of the cover torus used for the field, stand-ins along open directions."""
    cols = [space.lattice[:, i] for i in range(space.lattice.shape[1])]
    opn = space.open_dirs
    if opn.shape[1] == 1:
        cols.append(open_length * opn[:, 0])
    elif opn.shape[1] == 2:
        e1, e2 = opn[:, 0], opn[:, 1]
        q = space.twist_order
        if q in SQUARE_TWISTS:
            cols += [open_length * e1, open_length * e2]
        elif q in HEX_TWISTS:
            cols += [open_length * e1, open_length * (-0.5 * e1 + math.sqrt(3) / 2 * e2)]
        else:
            raise SkyParamError("angles_deg", list(space.angles_deg or ()),
                                "a slab twist of 0, 60, 90, 120, 180, 240, 270 or 300 degrees for skies "
                                "(other twists have no periodic stand-in lattice)")
    elif opn.shape[1] == 3:
        cols += [open_length * opn[:, i] for i in range(3)]
    return np.stack(cols, axis=1)


def integer_actions(space: Space, lat: np.ndarray):
    """M_h = B^-1 R_h B (integer) for the dual basis B = L^-T, one per holonomy representative."""
    B = np.linalg.inv(lat).T
    Binv = lat.T
    out = []
    for _, h in space.holonomy:
        M = Binv @ h.R @ B
        Mi = np.rint(M)
        if np.max(np.abs(M - Mi)) > 1e-6:
            raise RuntimeError(f"{space.name}: holonomy does not preserve the sky lattice")
        out.append(Mi.astype(np.int64))
    return out


def check_stand_in(space: Space, lat: np.ndarray, reach=2.0):
    """Raise SkyParamError if the stand-in periods add circle pairs the true space does not have."""
    if space.open_dirs.shape[1] == 0:
        return
    x0 = space.observer
    true = {_ikey(g) for _, g, _ in elements_within(space, reach)}
    for _, h in space.holonomy:
        v = h(x0) - x0
        for n in lattice_points_within(lat, v, reach):
            g = Isometry(h.R, h.t + lat @ n)
            if np.allclose(g.R, np.eye(3)) and np.allclose(g.t, 0, atol=1e-12):
                continue
            if _ikey(g) not in true:
                raise SkyParamError(
                    "open_length_chi", None,
                    f"a stand-in period long enough to add no circles from this observer (an extra image lies "
                    f"at {np.linalg.norm(g(x0) - x0):.3f} chi); lengthen it or move the observer")


def _ikey(g, nd=7):
    return tuple(np.round(g.R, nd).ravel() + 0.0) + tuple(np.round(g.t, nd) + 0.0)


def box_half_sizes(lat, kmax):
    return np.floor(kmax * np.linalg.norm(lat, axis=0) / (2 * np.pi)).astype(np.int64)


def estimate_modes(space: Space, kmax, open_length=4.0):
    """(number of modes in the ball |k| <= kmax, number of cells of the bounding integer box)."""
    lat = sky_lattice(space, open_length)
    vol = abs(np.linalg.det(lat))
    n_ball = vol * (4 * np.pi / 3) * kmax**3 / (2 * np.pi) ** 3
    box = int(np.prod(2 * box_half_sizes(lat, kmax) + 1))
    return int(n_ball), box


def estimate_memory_bytes(space: Space, kmax, open_length=4.0, physics="sw"):
    """Rough peak memory of one sky: mode lists plus (sw) the NUFFT box at upsampling 1.25."""
    n_ball, box = estimate_modes(space, kmax, open_length)
    per_mode = 360 if physics == "full" else 120
    b = per_mode * n_ball
    if physics == "sw":
        b += 16 * box * (1 + 1.25**3)
    return int(b)


def ball_modes(lat, kmax):
    """Integer n (M, 3), lexicographically sorted, with 0 < |k| <= kmax; symmetric under n -> -n."""
    N = box_half_sizes(lat, kmax)
    B = np.linalg.inv(lat).T
    G = (2 * np.pi) ** 2 * (B.T @ B)
    r1 = np.arange(-N[1], N[1] + 1)
    r2 = np.arange(-N[2], N[2] + 1)
    n1g, n2g = np.meshgrid(r1, r2, indexing="ij")
    n1g, n2g = n1g.ravel(), n2g.ravel()
    parts = []
    k2max = kmax * kmax * (1 + 1e-12)
    for i in range(-N[0], N[0] + 1):
        k2 = (G[0, 0] * i * i + G[1, 1] * n1g**2 + G[2, 2] * n2g**2
              + 2 * (G[0, 1] * i * n1g + G[0, 2] * i * n2g + G[1, 2] * n1g * n2g))
        sel = k2 <= k2max
        if i == 0:
            sel &= (n1g != 0) | (n2g != 0)
        if np.any(sel):
            parts.append(np.stack([np.full(sel.sum(), i), n1g[sel], n2g[sel]], axis=1))
    n = np.concatenate(parts) if parts else np.zeros((0, 3), np.int64)
    return n.astype(np.int64), N


@dataclass
class Modes:
    """A group-invariant realisation: Phi(x) = sum coef exp(i k.x)."""

    lattice: np.ndarray      # (3, 3) columns, chi
    n: np.ndarray            # (M, 3) integer, lexicographic, symmetric
    half: np.ndarray         # (3,) box half sizes
    k: np.ndarray            # (M, 3) wave vectors, 1/chi, map frame
    coef: np.ndarray         # (M,) complex, Hermitian: coef[M-1-i] = conj(coef[i])

    @property
    def kmag(self):
        return np.linalg.norm(self.k, axis=1)


def phi_power(k, a_s, n_s, pivot_chi):
    """P_Phi(k) in chi^3 (k in 1/chi): 2 pi^2 (9/25) A_s (k / k_pivot)^(n_s - 1) / k^3."""
    k = np.asarray(k, float)
    return 2 * np.pi**2 * (9.0 / 25.0) * a_s * (k / pivot_chi) ** (n_s - 1.0) / k**3


def invariant_modes(space: Space, kmax, rng, a_s=2.105e-9, n_s=0.9665, pivot_chi=694.0, open_length=4.0) -> Modes:
    """Group-invariant Gaussian coefficients of Phi for all modes with |k| <= kmax (1/chi)."""
    lat = sky_lattice(space, open_length)
    acts = integer_actions(space, lat)
    n, N = ball_modes(lat, kmax)
    M = n.shape[0]
    B2 = 2 * np.pi * np.linalg.inv(lat).T
    nf = n.astype(np.float64)
    k = nf @ B2.T
    dims = tuple(int(d) for d in 2 * N + 1)
    g = (rng.standard_normal(M) + 1j * rng.standard_normal(M)) / math.sqrt(2.0)
    c = (g + np.conj(g[::-1])) / math.sqrt(2.0)         # Hermitian: index of -n is M-1-i
    del g
    strides = np.array([dims[1] * dims[2], dims[2], 1], dtype=np.int64)
    offset = int(N @ strides)

    def linear(m):
        return m @ strides + offset

    if math.prod(dims) <= 2e8:
        where = np.full(math.prod(dims), -1, dtype=np.int32)
        where[linear(n)] = np.arange(M, dtype=np.int32)
        lookup = lambda m: where[linear(m)]  # noqa: E731
    else:
        lin = linear(n)                                   # ascending (lexicographic order)
        lookup = lambda m: np.searchsorted(lin, linear(m))  # noqa: E731
    coef = np.zeros(M, complex)
    for (_, h), A in zip(space.holonomy, acts):
        if np.array_equal(A, np.eye(3, dtype=np.int64)):
            coef += c * np.exp(1j * (k @ h.t))
            continue
        m = n @ A.T
        j = lookup(m)
        # phase (R_h k) . t_h = k . (R_h^T t_h)
        coef += c[j] * np.exp(1j * (k @ (h.R.T @ h.t)))
        del m, j
    del c
    vol = abs(np.linalg.det(lat))
    kmag = np.sqrt(np.einsum("ij,ij->i", k, k))
    coef *= np.sqrt(phi_power(kmag, a_s, n_s, pivot_chi) / vol / len(acts))
    return Modes(lattice=lat, n=n, half=N, k=k, coef=coef)


def field_at(modes: Modes, points, eps=1e-10, nthreads=0, complex_values=False):
    """Phi at 3-D points (..., 3), chi units (type-2 NUFFT over the mode box).

    ``complex_values``: return the complex sum (its imaginary part vanishes for a real field).
    """
    pts = np.asarray(points, float).reshape(-1, 3)
    theta = 2 * np.pi * (pts @ np.linalg.inv(modes.lattice).T)
    theta = (theta + np.pi) % (2 * np.pi) - np.pi
    dims = tuple(int(d) for d in 2 * modes.half + 1)
    box = np.zeros(dims, complex)
    box[tuple((modes.n + modes.half).T)] = modes.coef
    import finufft

    opts = dict(upsampfac=1.25) if eps >= 1e-9 else {}
    vals = finufft.nufft3d2(np.ascontiguousarray(theta[:, 0]), np.ascontiguousarray(theta[:, 1]),
                            np.ascontiguousarray(theta[:, 2]), box, isign=1, eps=eps, nthreads=nthreads, **opts)
    vals = vals if complex_values else vals.real
    return vals.reshape(np.shape(points)[:-1])


# --------------------------------------------------------------------------- harmonic coefficients
def gl_grid(lmax, lcontent):
    """Gauss-Legendre grid (ntheta, nphi) exact for analysis to lmax of content up to lcontent."""
    import scipy.fft

    ntheta = (lmax + lcontent + 2) // 2 + 1
    nphi = scipy.fft.next_fast_len(lmax + lcontent + 2)
    nphi += nphi % 2
    return ntheta, nphi


def sw_alm(modes: Modes, observer, lmax, t0_uk, kmax, nthreads=0):
    """a_lm (uK, healpy order) of dT = T0 Phi / 3 on the unit sphere about the observer."""
    import ducc0

    ntheta, nphi = gl_grid(lmax, int(math.ceil(kmax)) + L_MARGIN)
    x, _ = np.polynomial.legendre.leggauss(ntheta)
    theta = np.arccos(x[::-1])                               # north to south
    phi = 2 * np.pi * np.arange(nphi) / nphi
    st, ct = np.sin(theta), np.cos(theta)
    v = np.stack([st[:, None] * np.cos(phi)[None, :], st[:, None] * np.sin(phi)[None, :],
                  np.broadcast_to(ct[:, None], (ntheta, nphi))], axis=-1)
    vals = field_at(modes, v + np.asarray(observer, float), eps=1e-9, nthreads=nthreads)
    m = (t0_uk / 3.0) * vals
    alm = ducc0.sht.experimental.analysis_2d(map=m.reshape(1, ntheta, nphi), spin=0, lmax=lmax, geometry="GL",
                                             nthreads=nthreads)
    return alm[0]


def _lagrange_weights(grid, x):
    """Four-point Lagrange weights of x on a monotonic grid: (first node index (n,), weights (n, 4))."""
    i = np.clip(np.searchsorted(grid, x) - 2, 0, grid.size - 4)
    nodes = [grid[i + a] for a in range(4)]
    w = np.empty((x.size, 4))
    for a in range(4):
        num = np.ones_like(x)
        for b in range(4):
            if a != b:
                num *= (x - nodes[b]) / (nodes[a] - nodes[b])
        w[:, a] = num
    return i, w


def full_alm(modes: Modes, observer, lmax, transfer, nthreads=1, epsilon=1e-7):
    """a_lm (uK) with CAMB transfer functions; only l >= 2 (CAMB provides no l < 2).

    With W_k = R_k exp(i k.x0) (Hermitian: W_-k = W_k*) and the real point
    weights u_k = Re W_k + Im W_k, the adjoint transform A over all modes gives
    2 sum_{half} Re W Y* at even l and 2 sum_{half} Im W Y* at odd l, so
    a_lm = 4 pi T0 i^l Delta_l A_lm (even l) or 4 pi T0 i^(l+1) Delta_l A_lm (odd l)
    needs one transform per q node.
    """
    import ducc0

    k = modes.k
    kmag = np.linalg.norm(k, axis=1)
    W = -(5.0 / 3.0) * modes.coef * np.exp(1j * (k @ np.asarray(observer, float)))
    u = W.real + W.imag
    del W
    q = kmag / transfer.chi_mpc
    if q.size and (q.max() > transfer.q[-1] or q.min() < transfer.q[0]):
        raise RuntimeError("modes outside CAMB's q range")
    order = np.argsort(q, kind="stable")            # modes by |k|: each q node's modes are contiguous
    q, u, k, kmag = q[order], u[order], k[order], kmag[order]
    base, w = _lagrange_weights(transfer.q, q)       # node base + a gets weight w[:, a]; base non-decreasing
    w *= u[:, None]
    del u
    theta = np.arccos(np.clip(k[:, 2] / kmag, -1, 1))
    phi = np.arctan2(k[:, 1], k[:, 0]) % (2 * np.pi)
    loc_all = np.stack([theta, phi], axis=1)
    del k, theta, phi
    l_of = hp.Alm.getlm(lmax)[0]
    factor = np.where(l_of % 2 == 0, 1.0 + 0j, 1j) * (1j) ** (l_of % 4)
    acc = np.zeros(hp.Alm.getsize(lmax), complex)
    if q.size:
        for j in range(int(base[0]), int(base[-1]) + 4):
            lo, hi = np.searchsorted(base, [j - 3, j + 1])   # the modes touching node j: one contiguous run
            if hi <= lo:
                continue
            wt = w[np.arange(lo, hi), j - base[lo:hi]]
            alm_j = ducc0.sht.adjoint_synthesis_general(map=wt.reshape(1, -1), spin=0, lmax=lmax,
                                                        loc=loc_all[lo:hi], epsilon=epsilon, nthreads=nthreads)[0]
            dl = np.zeros(lmax + 1)
            dl[2:] = transfer.delta[: lmax - 1, j]
            acc += dl[l_of] * alm_j
    alm = 4 * np.pi * transfer.tcmb_uk * factor * acc
    alm[l_of < 2] = 0.0
    return alm


# --------------------------------------------------------------------------- mode cut and its correction
@dataclass(frozen=True)
class ModeCut:
    """Where the modes stop and how the power they omit is put back.

    ``kmax``: |k| chi of the last mode kept.  ``kept[l]``: fraction of the
    isotropic C_l carried by the modes with |k| <= kmax (1 for l < 2).
    ``gain[l]``: the amplitude factor applied to a_lm, 1 / sqrt(kept[l]) with
    the correction, 1 without.
    """

    kmax: float
    kept: np.ndarray
    gain: np.ndarray
    automatic: bool
    tolerance: float

    @property
    def factor(self) -> float:
        """kmax / lmax."""
        return self.kmax / (self.kept.size - 1)

    @property
    def worst_omitted(self) -> float:
        """The largest fraction of any C_l (2 <= l <= lmax) carried by the omitted modes."""
        return float(1.0 - self.kept[2:].min()) if self.kept.size > 2 else 0.0


def sw_integral_total(ells, n_s):
    """int_0^inf x^(n_s - 2) j_l(x)^2 dx, closed form (Gradshteyn & Ryzhik 6.574.2 with j_l = sqrt(pi/2x) J_l+1/2).

    Proportional to the Sachs-Wolfe C_l of a power-law spectrum (Sachs & Wolfe 1967); 1 / (2 l (l + 1)) at n_s = 1.
    """
    from scipy.special import gammaln

    lam = 3.0 - float(n_s)
    nu = np.asarray(ells, float) + 0.5
    return (np.pi / 2) * np.exp(gammaln(lam) + gammaln(nu + (1 - lam) / 2) - lam * math.log(2.0)
                                - 2 * gammaln((1 + lam) / 2) - gammaln(nu + (1 + lam) / 2))


@functools.lru_cache(maxsize=8)
def _sw_kept_table(lmax, n_s, xmax):
    """(x = k chi grid, kept (lmax - 1, nx)): fraction of the Sachs-Wolfe C_l, l = 2..lmax, from |k| chi <= x."""
    from scipy.integrate import cumulative_trapezoid
    from scipy.special import spherical_jn

    x = np.arange(0.0, xmax + 2 * SW_DX, SW_DX)
    ells = np.arange(2, lmax + 1)
    kept = np.empty((ells.size, x.size))
    w = np.zeros_like(x)
    w[1:] = x[1:] ** (n_s - 2.0)
    total = sw_integral_total(ells, n_s)
    for i0 in range(0, ells.size, 32):                     # 32 multipoles at a time bounds the memory
        ll = ells[i0:i0 + 32]
        f = w[None, :] * spherical_jn(ll[:, None], x[None, :]) ** 2
        kept[i0:i0 + ll.size] = cumulative_trapezoid(f, x, axis=1, initial=0.0) / total[i0:i0 + 32, None]
    return x, kept


def _transfer_kept_table(transfer, lmax):
    """(x = q chi nodes, kept (lmax - 1, nx)): fraction of C_l, l = 2..lmax, from the transfer integral below x.

    The total adds to the integral up to CAMB's last node Q the part beyond it, taken to fall as 1/q^2
    (the Sachs-Wolfe asymptote <j_l^2> = 1 / (2 x^2); the Doppler and damping tails fall faster, so this
    over-counts slightly): tail(Q) = (I(Q) - I(Q / r)) / (r^2 - 1) with r about 2.
    """
    from scipy.integrate import cumulative_trapezoid

    q = transfer.q
    integ = transfer.primordial(q)[None, :] * transfer.delta[: lmax - 1] ** 2
    cum = cumulative_trapezoid(integ, np.log(q), axis=1, initial=0.0)
    h = int(np.searchsorted(q, q[-1] / 2.0))
    r = q[-1] / q[h]
    total = cum[:, -1] + (cum[:, -1] - cum[:, h]) / (r * r - 1.0)
    return q * transfer.chi_mpc, cum / total[:, None]


def _ref_kmax(recipe) -> float:
    """|k| chi the reference integrals must reach (CAMB's transfer functions are requested to here)."""
    k = REF_FACTOR * recipe.lmax
    if recipe.kmax_factor is not None:
        k = max(k, 1.25 * recipe.kmax_factor * recipe.lmax)
    return k


def mode_cut(recipe, cosmo=None, transfer=None) -> ModeCut:
    """The mode cut of a sky and the per-multipole correction for the power it omits.

    Automatic (``recipe.kmax_factor`` None): the smallest |k| chi >= lmax (rounded up to 0.01 lmax) at
    which the omitted part of C_l = int P(k) Delta_l(k)^2 dk is at most ``recipe.tail_tolerance`` for
    every 2 <= l <= lmax, from the same Delta_l the sky uses: j_l(k chi) (sw) or CAMB's transfer
    functions (full).  The rest is put back by scaling a_lm by 1 / sqrt(kept fraction)
    (``recipe.correct_tail``), so band powers have the isotropic expectation at every l <= lmax.
    ``transfer``: CAMB transfer functions reaching ``_ref_kmax(recipe)`` (computed when None).
    """
    from .. import cosmology

    lmax = int(recipe.lmax)
    tol = float(recipe.tail_tolerance)
    explicit = recipe.kmax_factor is not None
    k_explicit = float(recipe.kmax_factor) * lmax if explicit else None
    if recipe.physics == "sw":
        n_s = cosmology._params(cosmo)[8]
        # a grid that reaches the cut: omitted ~ l (l + 1) / (2 x^2) far beyond l
        need = 1.3 * lmax * math.sqrt(0.5 / max(tol, 1e-3)) + L_MARGIN
        xmax = float(math.ceil(max(need, k_explicit or 0.0, lmax + L_MARGIN)))
        x, kept = _sw_kept_table(lmax, float(n_s), xmax)
    else:
        if transfer is None:
            transfer = cosmology.transfer_functions(lmax, _ref_kmax(recipe), cosmo)
        x, kept = _transfer_kept_table(transfer, lmax)
    if explicit:
        kmax = k_explicit
    else:
        worst = 1.0 - kept.min(axis=0) if kept.size else np.zeros_like(x)
        ok = (worst <= tol) & (x >= lmax)
        kmax = float(x[np.argmax(ok)]) if ok.any() else float(x[-1])
        kmax = max(kmax, float(lmax))
        kmax = lmax * math.ceil(round(100.0 * kmax / lmax, 9)) / 100.0
        kmax = min(kmax, float(x[-1]))
    i = int(np.clip(np.searchsorted(x, kmax) - 1, 0, x.size - 2))
    t = (kmax - x[i]) / (x[i + 1] - x[i])
    kept_l = np.ones(lmax + 1)
    kept_l[2:] = np.clip((1 - t) * kept[:, i] + t * kept[:, i + 1], 1e-12, 1.0)
    gain = 1.0 / np.sqrt(kept_l) if recipe.correct_tail else np.ones(lmax + 1)
    return ModeCut(kmax=float(kmax), kept=kept_l, gain=gain, automatic=not explicit, tolerance=tol)


# --------------------------------------------------------------------------- maps
def noise_map(nside, noise_uk_arcmin, rng):
    """White noise (uK) of the given depth (uK-arcmin) per HEALPix pixel."""
    npix = hp.nside2npix(nside)
    if noise_uk_arcmin <= 0:
        return np.zeros(npix)
    pix_arcmin = math.sqrt(hp.nside2pixarea(nside, degrees=True)) * 60.0
    return rng.standard_normal(npix) * (noise_uk_arcmin / pix_arcmin)


def demo_mask(nside, band_deg=12.0, n_holes=30, hole_deg=1.5, rng=None):
    """A galactic-like mask (1 = valid): a band about the equator, wider towards lon 0, plus round holes."""
    rng = rng if rng is not None else np.random.default_rng(0)
    npix = hp.nside2npix(nside)
    theta, phi = hp.pix2ang(nside, np.arange(npix))
    lat = 90.0 - np.degrees(theta)
    dlon = (np.degrees(phi) + 180.0) % 360.0 - 180.0
    width = band_deg * (1.0 + 0.8 * np.exp(-0.5 * (dlon / 30.0) ** 2))
    mask = (np.abs(lat) >= width).astype(np.float64) if band_deg > 0 else np.ones(npix)
    if n_holes > 0:
        z = rng.uniform(-1, 1, n_holes)
        lon = rng.uniform(0, 2 * np.pi, n_holes)
        r = np.sqrt(1 - z * z)
        for vx, vy, vz in zip(r * np.cos(lon), r * np.sin(lon), z):
            mask[hp.query_disc(nside, (vx, vy, vz), np.radians(hole_deg), inclusive=False)] = 0.0
    return mask


@dataclass(frozen=True)
class SkyRecipe:
    """Everything make_sky needs besides the space (all plain values)."""

    nside: int = 64
    lmax: int = 128
    fwhm_deg: float = 3.0
    physics: str = "sw"
    seed: int = 5
    noise_uk_arcmin: float = 0.0
    lmin: int = 2
    kmax_factor: float | None = None       # None: automatic cut (mode_cut); else |k| chi <= kmax_factor * lmax
    open_length: float = 4.0
    tail_tolerance: float = TAIL_TOLERANCE
    correct_tail: bool = True


def check_sky(space: Space, recipe: SkyRecipe, memory_gb=None, cosmo=None):
    """Raise SkyParamError before any work for parameters that cannot make a sky.

    With ``memory_gb`` and an automatic cut, the cut is computed here (CAMB's transfer functions for
    full physics; cached for the sky that follows).
    """
    if recipe.physics not in PHYSICS:
        raise SkyParamError("physics", recipe.physics, " | ".join(PHYSICS))
    if recipe.lmax > 3 * recipe.nside - 1:
        raise SkyParamError("lmax", recipe.lmax, f"at most 3*nside-1 = {3 * recipe.nside - 1}")
    if recipe.kmax_factor is not None and recipe.kmax_factor < 1.0:
        raise SkyParamError("kmax_factor", recipe.kmax_factor, ">= 1 (modes must reach |k| chi = lmax)")
    if not (recipe.open_length > 2.0):
        raise SkyParamError("open_length_chi", recipe.open_length, "> 2 (longer than the sphere's diameter)")
    lat = sky_lattice(space, recipe.open_length)
    integer_actions(space, lat)
    check_stand_in(space, lat)
    if not (0.0 < recipe.tail_tolerance < 1.0):
        raise SkyParamError("tail_tolerance", recipe.tail_tolerance, "a fraction in (0, 1)")
    if memory_gb is not None:
        kmax = mode_cut(recipe, cosmo).kmax
        need = estimate_memory_bytes(space, kmax, recipe.open_length, recipe.physics)
        if need > memory_gb * 1e9:
            n_ball, _ = estimate_modes(space, kmax, recipe.open_length)
            raise SkyParamError(
                "kmax_factor", recipe.kmax_factor,
                f"a mode count that fits compute.memory_gb = {memory_gb} ({n_ball:.3g} modes to |k| chi = "
                f"{kmax:.0f} need about {need / 1e9:.1f} GB; set a lower sky.kmax_factor (the omitted power is "
                f"put back per multipole) or sky.lmax, or shrink the cover torus)")


def sky_alm(space: Space, recipe: SkyRecipe, cosmo=None, nthreads=0, rng=None):
    """Unbeamed a_lm (uK, healpy order, l <= lmax; l < lmin zeroed) of one invariant sky.

    Modes to the cut of ``mode_cut``; each multipole scaled by the cut's gain (the omitted power).
    """
    from .. import cosmology

    check_sky(space, recipe)
    if rng is None:
        rng = np.random.default_rng(np.random.SeedSequence(recipe.seed).spawn(3)[0])
    p = cosmology._params(cosmo)
    a_s, n_s, pivot_mpc = p[7], p[8], p[9]
    tr = cosmology.transfer_functions(recipe.lmax, _ref_kmax(recipe), cosmo) if recipe.physics == "full" else None
    cut = mode_cut(recipe, cosmo, transfer=tr)
    kmax = cut.kmax
    chi_mpc = cosmology.chi_ls_gpc(cosmo) * 1000.0
    modes = invariant_modes(space, kmax, rng, a_s=a_s, n_s=n_s, pivot_chi=pivot_mpc * chi_mpc,
                            open_length=recipe.open_length)
    if recipe.physics == "sw":
        alm = sw_alm(modes, space.observer, recipe.lmax, cosmology.t0_uk(cosmo), kmax, nthreads=nthreads)
    else:
        alm = full_alm(modes, space.observer, recipe.lmax, tr, nthreads=1)
    del modes
    l_of = hp.Alm.getlm(recipe.lmax)[0]
    alm *= cut.gain[l_of]
    alm[l_of < recipe.lmin] = 0.0
    return alm


def make_sky(space: Space, nside=64, lmax=128, fwhm_deg=3.0, physics="sw", seed=5, noise_uk_arcmin=0.0,
             lmin=2, kmax_factor=None, open_length=4.0, cosmo=None, nthreads=0, return_alm=False,
             tail_tolerance=TAIL_TOLERANCE, correct_tail=True):
    """A HEALPix RING map (uK) of the space seen by its observer: beam (FWHM, degrees) and white noise.

    Seeds: SeedSequence(seed).spawn(3) -> (modes, noise, mask); the same seed
    gives the same realisation in both physics.
    """
    recipe = SkyRecipe(nside=nside, lmax=lmax, fwhm_deg=fwhm_deg, physics=physics, seed=seed,
                       noise_uk_arcmin=noise_uk_arcmin, lmin=lmin, kmax_factor=kmax_factor,
                       open_length=open_length, tail_tolerance=tail_tolerance, correct_tail=correct_tail)
    ss_modes, ss_noise, _ = np.random.SeedSequence(seed).spawn(3)
    alm = sky_alm(space, recipe, cosmo=cosmo, nthreads=nthreads, rng=np.random.default_rng(ss_modes))
    if fwhm_deg > 0:
        alm = hp.almxfl(alm, hp.gauss_beam(np.radians(fwhm_deg), lmax=lmax))
    m = hp.alm2map(alm, nside, lmax=lmax)
    m = m + noise_map(nside, noise_uk_arcmin, np.random.default_rng(ss_noise))
    return (m, alm) if return_alm else m


def mask_for_seed(nside, seed, band_deg=12.0, n_holes=30, hole_deg=1.5):
    """The demo mask drawn from the sky seed's third stream."""
    ss_mask = np.random.SeedSequence(seed).spawn(3)[2]
    return demo_mask(nside, band_deg, n_holes, hole_deg, np.random.default_rng(ss_mask))
