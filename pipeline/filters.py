"""What matches on both views of a circle, and the multipole filter that weights it.

Decomposition (:func:`source_split`).  CAMB's line-of-sight temperature source
(Newtonian-gauge form, as ``camb.symbolic.get_scalar_temperature_sources``
writes it) is the sum of

* the monopole term ``g (Delta_g/4 + Psi)`` (Sachs-Wolfe plus intrinsic
  density): a function of the point of last scattering only, so it is the same
  on both views of a matched point (``match``);
* the Doppler term ``(g v_b)' / k`` (the baryon velocity projected on the line
  of sight);
* the integrated Sachs-Wolfe term ``2 exp(-tau) phi'`` (``phi`` the Weyl
  potential (Phi + Psi)/2), gathered along the path;
* a small quadrupole (polarisation) term, kept here with the monopole part.

The symbolic module's custom sources need a Fortran compiler at run time, so
the split is done with CAMB's named time-evolution outputs instead: the
Doppler and ISW transfer functions are integrated along the line of sight
from ``v_newtonian_baryon``, ``Weyl`` (= k^2 phi) and the visibility, and the
match part is CAMB's total transfer minus the two.  The line-of-sight
integral of CAMB's own ``T_source`` reproduces CAMB's ``delta_p_l_k`` to
1e-3 on this grid (checked in tests/test_filters.py), so the parts share
CAMB's normalisation and sign.

Decorrelation (:func:`pair_spectrum`).  The two lines of sight to a point of a
circle pair of angular radius alpha (a pure translation) meet at
theta = 180 deg - 2 alpha (n1 . n2 = -cos 2 alpha).  Model used here, per
multipole, for the covariance of the two views:

* match: identical, coefficient 1;
* Doppler (v . n, a dipole in the direction of view): coefficient
  n1 . n2 = -cos 2 alpha (1 at alpha = 90 deg, 0 at 45 deg, -1 for small circles);
* ISW (an integral seen along two paths leaving the point, and reaching the
  observer's images, at angle theta): P_l(cos theta), as for one sky seen in
  two directions theta apart;
* cross spectra: the mean of the two parts' coefficients.

This is exact at zero lag for the unfiltered Doppler term and an
approximation otherwise (the filtered Doppler field is not local).

Expected S and the optimal filter.  For a ring of radius alpha the Fourier
mode m of an isotropic field with spectrum C_l has power
P_m = sum_l C_l lambda_lm(cos alpha)^2 (lambda_lm the normalised associated
Legendre function).  With ring weights W_m (1 or |m|, m >= 1) and a filter
f_l on the a_lm, beam b_l, noise N_l:

    E[S_true](alpha) = sum_m W_m P^pair_m / sum_m W_m P^tot_m
    sigma_null(alpha) = sqrt( sum_m W_m^2 (P^tot_m)^2 / 2 ) / sum_m W_m P^tot_m

with P^pair from f_l^2 b_l^2 C^pair_l(alpha) and P^tot from
f_l^2 (b_l^2 C_l + N_l).  The detection margin of a true pair over the
null's spread is their ratio (:func:`margin`).  With modes independent per
l, the margin is largest for f_l^2 proportional to b_l^2 C^pair_l /
(b_l^2 C_l + N_l)^2 (the matched filter for a known correlated part in
Gaussian noise); :func:`optimal_filter` averages that over the reference
radii :data:`REF_RADII_DEG` (one filter for all radii).  Key, Cornish,
Spergel & Starkman (2007, Phys. Rev. D 75, 084034) weight multipoles by the
part of the power that matches on both circles; the README says where this
follows them and where it differs.
"""
from __future__ import annotations

import functools
import hashlib
import math
from dataclasses import dataclass

import numpy as np

FILTERS = ("none", "multipole", "optimal")
RING_FLOOR = 1e-3    # ring-mode power floor for the optimal weights, relative to the strongest mode (mask leakage, aliasing)
TABLE_STEP_DEG = 1.0  # radius step of the optimal filter's weight table (linear interpolation between)
REF_RADII_DEG = (20.0, 30.0, 40.0, 50.0, 60.0, 70.0)
JL_DX = 0.02         # grid step of the tabulated spherical Bessel functions (linear interpolation error ~5e-5)
ETA_CUT = 2.2       # conformal times after ETA_CUT x the visibility peak count as "late" (ISW, reionisation)
X_FLOOR = 1e-6       # smallest squared filter weight relative to the largest


# --------------------------------------------------------------------------- decomposition
@dataclass(frozen=True)
class SourceSplit:
    """Per-l spectra (uK^2, l = 0..lmax) of the parts of the temperature and their cross spectra."""

    lmax: int
    total: np.ndarray        # C_l of CAMB's total transfer (this q grid)
    match: np.ndarray        # monopole (SW + density) + quadrupole term
    doppler: np.ndarray
    isw: np.ndarray
    match_doppler: np.ndarray   # cross spectra (counted once; total = sum of autos + 2 x crosses)
    match_isw: np.ndarray
    doppler_isw: np.ndarray
    camb_total: np.ndarray   # CAMB's own unlensed TT (reference)

    @property
    def unmatched(self) -> np.ndarray:
        """Everything that is not the match auto spectrum: total - match."""
        return self.total - self.match


def _split_transfers(lmax, cosmo, q_stride=1):
    """CAMB total, Doppler and ISW transfer functions Delta_l(q) (dT/T per unit curvature)."""
    from scipy.special import spherical_jn
    from . import cosmology

    c = cosmology._Defaults(*cosmology._params(cosmo))
    res, td, want, idx = cosmology.scalar_transfer(c, lmax, 8.0 * lmax + 50.0)
    q = np.asarray(td.q, float)[::q_stride]
    total = np.asarray(td.delta_p_l_k[0], float)[idx][:, ::q_stride]
    tau0 = float(res.tau0)
    eta_rec = float(res.tau_maxvis)
    etas = np.concatenate([np.linspace(0.6 * eta_rec, 2.2 * eta_rec, 240),
                           np.geomspace(2.2 * eta_rec * 1.002, tau0 * 0.9995, 360)])
    ev = res.get_time_evolution(q, etas, ["T_source"], lAccuracyBoost=1)
    t_src = ev[:, :, 0] if ev.ndim == 3 else ev
    # trapezoid weights on the non-uniform grid
    wq = np.empty_like(etas)
    d = np.diff(etas)
    wq[0], wq[-1] = d[0] / 2, d[-1] / 2
    wq[1:-1] = (d[:-1] + d[1:]) / 2
    late = etas > ETA_CUT * eta_rec
    x = q[:, None] * (tau0 - etas[None, :])
    r_star = tau0 - eta_rec
    nl = want.size
    rec = np.empty((nl, q.size))
    lat = np.empty((nl, q.size))
    jl_star = np.empty((nl, q.size))
    djl_star = np.empty((nl, q.size))
    # j_l on a fine grid of its argument, interpolated: the line-of-sight integrals need it at
    # ~10^6 points per l, and scipy's spherical_jn there was 90 % of the time
    xs = np.arange(0.0, float(x.max()) + 2 * JL_DX, JL_DX)
    for i, ell in enumerate(want):
        jl = np.interp(x, xs, spherical_jn(int(ell), xs)) * wq[None, :]
        rec[i] = np.sum(t_src[:, ~late] * jl[:, ~late], axis=1)
        lat[i] = np.sum(t_src[:, late] * jl[:, late], axis=1)
        jl_star[i] = spherical_jn(int(ell), q * r_star)
        djl_star[i] = spherical_jn(int(ell), q * r_star, derivative=True)
    # thin shell at the peak of the visibility: rec_l(q) = A(q) j_l(q r*) + B(q) j_l'(q r*), per q over l
    mono = np.empty_like(rec)
    dop = np.empty_like(rec)
    for k in range(q.size):
        basis = np.stack([jl_star[:, k], djl_star[:, k]], axis=1)
        coef, *_ = np.linalg.lstsq(basis, rec[:, k], rcond=None)
        mono[:, k] = coef[0] * jl_star[:, k]
        dop[:, k] = coef[1] * djl_star[:, k]
    resid = rec - mono - dop
    return dict(q=q, ells=want, total=total, doppler=dop, isw=lat, resid=resid, los_total=rec + lat, a_s=c.a_s,
                n_s=c.n_s, pivot=c.pivot_mpc, tcmb_uk=c.tcmb * 1e6)


def _cl(tr, a, b):
    q = tr["q"]
    prim = tr["a_s"] * (q / tr["pivot"]) ** (tr["n_s"] - 1.0)
    return tr["tcmb_uk"] ** 2 * 4 * np.pi * np.trapezoid(prim * a * b, np.log(q), axis=1)


SPLIT_FIELDS = ("total", "match", "doppler", "isw", "match_doppler", "match_isw", "doppler_isw", "camb_total")


def cache_dir():
    """Where computed source splits are kept between runs: $TWINRING_CACHE, else ~/.cache/twinring."""
    import os
    from pathlib import Path

    return Path(os.environ.get("TWINRING_CACHE") or Path.home() / ".cache" / "twinring")


@functools.lru_cache(maxsize=4)
def _source_split(params, lmax, q_stride):
    """The split, from the disk cache when an earlier run computed it (plain npz arrays, no pickle)."""
    import os

    key = hashlib.sha256(repr(("source-split-2", params, lmax, q_stride)).encode()).hexdigest()[:20]
    path = cache_dir() / f"split-{key}.npz"
    try:
        with np.load(path, allow_pickle=False) as z:
            arrays = {f: np.asarray(z[f], float) for f in SPLIT_FIELDS}
        if all(a.shape == (lmax + 1,) for a in arrays.values()):
            return SourceSplit(lmax=lmax, **arrays)
    except (OSError, ValueError, KeyError):
        pass
    out = _compute_split(params, lmax, q_stride)
    try:                                   # atomic: write a temporary file, then rename it into place
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp.npz")
        np.savez(tmp, **{f: getattr(out, f) for f in SPLIT_FIELDS})
        os.replace(tmp, path)
    except OSError:
        pass                               # a read-only home only costs the recomputation
    return out


def _compute_split(params, lmax, q_stride):
    from . import cosmology

    c = cosmology._Defaults(*params)
    tr = _split_transfers(lmax, c, q_stride)
    m = tr["total"] - tr["doppler"] - tr["isw"]
    d, i = tr["doppler"], tr["isw"]

    def pad(v):
        out = np.zeros(lmax + 1)
        out[2:] = v
        return out

    camb_tt = cosmology.isotropic_cl(lmax, c)
    return SourceSplit(lmax=lmax, total=pad(_cl(tr, tr["total"], tr["total"])), match=pad(_cl(tr, m, m)),
                       doppler=pad(_cl(tr, d, d)), isw=pad(_cl(tr, i, i)), match_doppler=pad(_cl(tr, m, d)),
                       match_isw=pad(_cl(tr, m, i)), doppler_isw=pad(_cl(tr, d, i)), camb_total=camb_tt)


def source_split(lmax, cosmo=None, q_stride=1) -> SourceSplit:
    """The matched / unmatched split of CAMB's temperature spectrum for l <= ``lmax`` (cached).

    ``q_stride`` > 1 thins CAMB's q grid (faster, less accurate; tests).
    """
    from . import cosmology

    return _source_split(cosmology._params(cosmo), int(lmax), int(q_stride))


def los_check(lmax, cosmo=None, q_stride=1):
    """(CAMB's delta_p_l_k, line-of-sight integral of CAMB's T_source): the integrator's check."""
    from . import cosmology

    tr = _split_transfers(int(lmax), cosmology._Defaults(*cosmology._params(cosmo)), int(q_stride))
    return tr["total"], tr["los_total"]


# --------------------------------------------------------------------------- geometry of the two views
def view_angle_cos(alpha_deg) -> float:
    """cos of the angle between the two lines of sight to a point of a circle of radius alpha: -cos 2 alpha."""
    return -math.cos(math.radians(2.0 * float(alpha_deg)))


def pair_coefficients(lmax, alpha_deg):
    """Per-l covariance coefficients of the two views: (match, doppler, isw) arrays (l = 0..lmax)."""
    from scipy.special import eval_legendre

    c = view_angle_cos(alpha_deg)
    ell = np.arange(lmax + 1)
    return np.ones(lmax + 1), np.full(lmax + 1, c), eval_legendre(ell, c)


def pair_spectrum(split: SourceSplit, alpha_deg) -> np.ndarray:
    """Covariance spectrum of the two views of a matched circle pair of radius alpha (uK^2, per l)."""
    rm, rd, ri = pair_coefficients(split.lmax, alpha_deg)
    return (split.match * rm + split.doppler * rd + split.isw * ri
            + 2 * split.match_doppler * (rm + rd) / 2 + 2 * split.match_isw * (rm + ri) / 2
            + 2 * split.doppler_isw * (rd + ri) / 2)


def unmatched_fraction(split: SourceSplit, alpha_deg) -> np.ndarray:
    """1 - pair / total per l: the part of each multipole's power lost to decorrelation at radius alpha."""
    tot = split.total
    out = np.zeros_like(tot)
    ok = tot > 0
    out[ok] = 1.0 - pair_spectrum(split, alpha_deg)[ok] / tot[ok]
    return out


# --------------------------------------------------------------------------- ring spectra, expected S
@functools.lru_cache(maxsize=64)
def _lambda_sq(lmax, alpha_deg):
    """lambda_lm(cos alpha)^2 for l, m = 0..lmax (array (lmax+1, lmax+1), zero for m > l)."""
    from scipy.special import sph_harm_y

    th = math.radians(float(alpha_deg))
    out = np.zeros((lmax + 1, lmax + 1))
    for ell in range(lmax + 1):
        m = np.arange(ell + 1)
        out[ell, : ell + 1] = np.abs(sph_harm_y(ell, m, th, 0.0)) ** 2
    out.setflags(write=False)
    return out


def ring_weights(lmax, weighting):
    """Ring weights W_m, m = 0..lmax: ``'m'``, ``'flat'`` or an array (the optimal filter's), as the
    search applies them (twinring.statistic.m_weights for rings of 2 lmax + 2 samples, whose Nyquist
    mode lies above lmax)."""
    from .statistic import m_weights

    return m_weights(2 * lmax + 2, weighting)[: lmax + 1]


def expected_s(split: SourceSplit, alpha_deg, filt=None, bl=None, nl=None, weighting="m", fwhm_deg=0.0,
               offset_deg=0.0):
    """(expected S of a true pair, null spread sigma of S) at radius alpha for filter ``filt`` (per l).

    ``bl``: beam window (default 1), ``nl``: noise spectrum (uK^2, default 0); ``weighting``: ``'m'``,
    ``'flat'`` or ring weights per mode (:func:`optimal_ring_weights`); ``fwhm_deg``: the Gaussian
    beam's width for :func:`beam_coherence`; ``offset_deg``: :func:`offset_coherence`.
    """
    lmax = split.lmax
    wm = ring_weights(lmax, weighting)
    p_pair, p_tot = ring_mode_spectra(split, alpha_deg, bl, nl, offset_deg, fwhm_deg, filt)
    den = np.sum(wm * p_tot)
    return float(np.sum(wm * p_pair) / den), float(math.sqrt(np.sum(wm ** 2 * p_tot ** 2) / 2.0) / den)


def margin(split, alpha_deg, filt=None, bl=None, nl=None, weighting="m") -> float:
    """Expected S of a true pair over the null spread of S."""
    s, sig = expected_s(split, alpha_deg, filt, bl, nl, weighting)
    return s / sig


# --------------------------------------------------------------------------- the filter
def diagonal_optimum(split: SourceSplit, alpha_deg, bl=None, nl=None, lmin=2):
    """Squared filter weights maximising the margin when every multipole were an independent mode:
    f_l^2 proportional to C^pair_l / (b_l^2 C_l + N_l)^2 (x b_l^2 for the beam on the signal), >= 0."""
    lmax = split.lmax
    b2 = np.ones(lmax + 1) if bl is None else np.asarray(bl, float)[: lmax + 1] ** 2
    n = np.zeros(lmax + 1) if nl is None else np.asarray(nl, float)[: lmax + 1]
    tot = b2 * split.total + n
    x = np.zeros(lmax + 1)
    ok = (tot > 0) & (np.arange(lmax + 1) >= lmin)
    x[ok] = np.maximum(b2[ok] * pair_spectrum(split, alpha_deg)[ok], 0.0) / tot[ok] ** 2
    return x / x.max() if x.max() > 0 else x


def optimal_filter(split: SourceSplit, bl=None, nl=None, lmin=2, radii=REF_RADII_DEG):
    """Per-l filter f_l (max 1, 0 below ``lmin``): f_l^2 the mean over ``radii`` of
    :func:`diagonal_optimum` (each normalised to max 1).

    One filter serves all radii (prepare makes one set of a_lm).  A numerical optimum of the
    margin over f_l (ring-mode mixing included) was tried and rejected: it puts all weight on
    two or three multipoles, where the Gaussian null spread above no longer describes the tail
    of the maximum over many pairs.
    """
    x = np.mean([diagonal_optimum(split, a, bl, nl, lmin) for a in radii], axis=0)
    if not x.max() > 0:
        raise ValueError("no multipole carries matched power at the reference radii")
    return np.sqrt(x / x.max())


@functools.lru_cache(maxsize=16)
def _filter_for(name, lmax, lmin, fwhm_deg):
    import healpy as hp

    if name != "multipole":
        return None
    split = source_split(lmax)
    bl = hp.gauss_beam(math.radians(fwhm_deg), lmax=lmax) if fwhm_deg > 0 else None
    f = optimal_filter(split, bl=bl, lmin=lmin)
    f.setflags(write=False)
    return f


def filter_window(prep) -> np.ndarray | None:
    """The per-l filter ``prepare.filter: multipole`` asks for (l = 0..prep.lmax); None for ``none``
    and ``optimal`` (which weights ring modes in the search instead: :func:`ring_filter`).

    Computed for the prepared beam ``prep.fwhm_deg``, no noise, the default cosmology and the
    reference radii; cached, so every map of a run (data, simulations, injections) gets the same one.
    """
    name = getattr(prep, "filter", "none")
    if name not in FILTERS:
        raise ValueError(f"unknown filter {name!r}")
    f = _filter_for(name, int(prep.lmax), int(prep.lmin), float(prep.fwhm_deg))
    return None if f is None else f.copy()


def filter_hash(f) -> str:
    """Short sha256 of a filter (``none`` for None), for provenance."""
    if f is None:
        return "none"
    return hashlib.sha256(np.round(np.asarray(f, float), 12).tobytes()).hexdigest()[:12]


# --------------------------------------------------------------------------- the optimal filter: ring modes, per radius
def offset_coherence(lmax, offset_deg) -> np.ndarray:
    """Mean correlation, per l, of the two views of a point sampled ``offset_deg`` (rms) apart:
    exp(-l(l+1) theta^2 / 4), the average of P_l(cos theta) over a 2-d Gaussian displacement of
    rms theta (small angles; common practice, no source)."""
    ell = np.arange(lmax + 1, dtype=float)
    return np.exp(-ell * (ell + 1) * math.radians(float(offset_deg)) ** 2 / 4.0)


def grid_offset_deg(scfg) -> float:
    """Rms distance between the points the search compares on a true pair it sees from its grid:
    sqrt((dr^2 + dc^2) / 3), dr the radius step, dc the centre spacing (0 for listed pairs).

    Each centre lies uniformly in a grid cell (rms dc / sqrt 6 off, independently for the two
    circles) and both radii share one offset (rms dr / sqrt 12, seen from opposite sides once
    matched, so doubled)."""
    import healpy as hp

    radii = np.asarray(scfg.radii_deg(), float)
    dr = float(np.min(np.diff(radii))) if radii.size > 1 else 0.0
    dc = math.degrees(hp.nside2resol(int(scfg.nside_centers))) if scfg.family != "listed" else 0.0
    return math.sqrt((dr ** 2 + dc ** 2) / 3.0)


BEAM_GRID = 121      # points per axis of the beam coherence's 2-d wavenumber integral


def beam_coherence(mmax, alpha_deg, fwhm_deg, n=BEAM_GRID) -> np.ndarray:
    """Correlation of ring mode m (0..mmax) between the two views of a matched circle that the beam
    alone leaves, for a field with a scale-invariant potential (P(k) ~ k^-3, Sachs-Wolfe).

    The two last-scattering spheres cross along the circle at the angle between the lines of sight,
    theta = 180 deg - 2 alpha.  Along the circle both views see the same points; across it the beam
    (Gaussian, rms sigma) averages neighbours that lie on different spheres.  Locally (flat sky,
    distances in units of chi), with u along the circle, t_i across it on sphere i and n_1 the first
    line of sight (t_2 = cos theta t_1 + sin theta n_1), mode m has k_u = m / sin alpha and

        rho_m = int P(k) exp(-sigma^2 (k_t1^2 + k_t2^2) / 2) / int P(k) exp(-sigma^2 k_t1^2)

    over (k_t1, k_n1): 1 without a beam or at alpha = 90 deg, falling as the beam widens, the circle
    shrinks or m grows.  Measured on Sachs-Wolfe torus skies with a 3 deg beam (this module's
    benchmark notes, README) within the scatter of three skies.
    """
    out = np.ones(int(mmax) + 1)
    sigma = math.radians(float(fwhm_deg)) / math.sqrt(8.0 * math.log(2.0))
    if sigma <= 0:
        return out
    a = math.radians(float(alpha_deg))
    th = math.pi - 2.0 * a
    c, s = math.cos(th), math.sin(th)
    q = np.linspace(-8.0 / sigma, 8.0 / sigma, int(n))
    qt, qn = np.meshgrid(q, q, indexing="ij")
    damp_auto = np.exp(-sigma ** 2 * qt ** 2)
    damp_cross = np.exp(-sigma ** 2 * (qt ** 2 + (c * qt + s * qn) ** 2) / 2.0)
    r2 = qt ** 2 + qn ** 2
    for m in range(1, int(mmax) + 1):
        p = (r2 + (m / math.sin(a)) ** 2) ** -1.5
        out[m] = float(np.sum(p * damp_cross) / np.sum(p * damp_auto))
    return out


def ring_mode_spectra(split: SourceSplit, alpha_deg, bl=None, nl=None, offset_deg=0.0, fwhm_deg=0.0, filt=None):
    """(P^pair_m, P^tot_m), m = 0..lmax: power of ring mode m shared by the two views of a true pair
    of radius alpha, and the total power of mode m on one ring (beam ``bl``, noise ``nl``, per-l
    filter ``filt``; the views sampled ``offset_deg`` rms apart: :func:`offset_coherence`; the beam's
    different neighbours on the two spheres, for a Gaussian beam of ``fwhm_deg``: :func:`beam_coherence`)."""
    lmax = split.lmax
    f2 = np.ones(lmax + 1) if filt is None else np.asarray(filt, float)[: lmax + 1] ** 2
    b2 = np.ones(lmax + 1) if bl is None else np.asarray(bl, float)[: lmax + 1] ** 2
    n = np.zeros(lmax + 1) if nl is None else np.asarray(nl, float)[: lmax + 1]
    lam = _lambda_sq(lmax, float(alpha_deg))
    shared = f2 * b2 * pair_spectrum(split, alpha_deg) * offset_coherence(lmax, offset_deg)
    return (shared @ lam) * beam_coherence(lmax, alpha_deg, fwhm_deg), (f2 * (b2 * split.total + n)) @ lam


def optimal_ring_weights(split: SourceSplit, alpha_deg, bl=None, nl=None, floor=None, offset_deg=0.0,
                         fwhm_deg=0.0) -> np.ndarray:
    """Ring-mode weights W_m (m = 0..lmax, max 1) of the optimal filter at radius alpha.

    S sums products of ring modes m; for an isotropic sky the modes of one ring are independent,
    so the null products have variance ~ (P^tot_m)^2 and a true pair's have mean P^pair_m.  The
    weighted sum's mean over its null spread is largest for W_m = P^pair_m / (P^tot_m)^2 (the
    matched filter over independent modes), each mode then counting by its correlation
    rho_m = P^pair_m / P^tot_m.  Modes whose shared power is negative (the Doppler part seen head
    on) get 0: S keeps one sign.  ``floor`` x the strongest mode's power is added to P^tot_m, so
    modes the beam has emptied (whose ring content is rounding) get no weight.  ``offset_deg``:
    rms distance between the compared points of a true pair seen from the search grid
    (:func:`grid_offset_deg`), and ``fwhm_deg``, the Gaussian beam's width (:func:`beam_coherence`),
    decorrelate the small scales.
    """
    pp, pt = ring_mode_spectra(split, alpha_deg, bl, nl, offset_deg, fwhm_deg)
    pt = pt + (RING_FLOOR if floor is None else floor) * float(np.max(pt[1:]))
    w = np.zeros_like(pp)
    w[1:] = np.maximum(pp[1:], 0.0) / pt[1:] ** 2
    if not w.max() > 0:
        raise ValueError(f"no ring mode carries matched power at radius {alpha_deg} deg")
    return w / w.max()


def ring_weight_table(split: SourceSplit, bl=None, nl=None, step=TABLE_STEP_DEG, offset_deg=0.0,
                      fwhm_deg=0.0) -> np.ndarray:
    """:func:`optimal_ring_weights` at radii step, 2 step, ... 90 deg: array (n_radii, lmax + 1)."""
    radii = np.arange(1, int(round(90.0 / step)) + 1) * step
    return np.stack([optimal_ring_weights(split, r, bl, nl, offset_deg=offset_deg, fwhm_deg=fwhm_deg)
                     for r in radii])


def weights_at(table, radius_deg, nsamp, step=TABLE_STEP_DEG) -> np.ndarray:
    """Ring weights for rings of ``nsamp`` samples at ``radius_deg`` (m = 0..nsamp // 2), linear in
    radius between the table's rows; modes above the table's lmax get 0."""
    table = np.asarray(table, float)
    x = min(max(float(radius_deg) / step, 1.0), float(table.shape[0])) - 1.0
    i0 = min(int(math.floor(x)), table.shape[0] - 1)
    i1 = min(i0 + 1, table.shape[0] - 1)
    t = x - i0
    row = (1.0 - t) * table[i0] + t * table[i1]
    out = np.zeros(nsamp // 2 + 1)
    k = min(out.size, row.size)
    out[:k] = row[:k]
    return out


def noise_spectrum(lmax, fwhm_deg, input_fwhm_deg, noise_uk_arcmin) -> np.ndarray | None:
    """White noise of ``noise_uk_arcmin`` on the input map, as prepare leaves it (re-beamed from the
    input beam ``input_fwhm_deg`` to ``fwhm_deg``): N_l in uK^2 (l = 0..lmax), or None for no noise."""
    import healpy as hp

    if not noise_uk_arcmin:
        return None
    n = (float(noise_uk_arcmin) * math.radians(1.0 / 60.0)) ** 2
    b_out = hp.gauss_beam(math.radians(fwhm_deg), lmax=lmax)
    b_in = hp.gauss_beam(math.radians(input_fwhm_deg), lmax=lmax)
    return n * (b_out / b_in) ** 2


@functools.lru_cache(maxsize=8)
def _ring_filter(lmax, fwhm_deg, input_fwhm_deg, noise_uk_arcmin, params, offset_deg):
    import healpy as hp

    from . import cosmology

    split = source_split(lmax, cosmology._Defaults(*params))
    bl = hp.gauss_beam(math.radians(fwhm_deg), lmax=lmax) if fwhm_deg > 0 else None
    table = ring_weight_table(split, bl, noise_spectrum(lmax, fwhm_deg, input_fwhm_deg, noise_uk_arcmin),
                              offset_deg=offset_deg, fwhm_deg=fwhm_deg)
    table.setflags(write=False)
    return table


def ring_filter(prep, noise_uk_arcmin=0.0, cosmo=None, offset_deg=0.0) -> np.ndarray | None:
    """The optimal filter's ring-weight table for ``prepare.filter: optimal`` (None otherwise).

    Computed once per process for the prepared beam, the survey's white noise level, the cosmology
    (CAMB's source split: about a minute at lmax 128) and the search grid's offset
    (:func:`grid_offset_deg`), then shipped in the search plan to every worker, so data,
    simulations and injections are weighted alike.
    """
    from . import cosmology

    if getattr(prep, "filter", "none") != "optimal":
        return None
    return _ring_filter(int(prep.lmax), float(prep.fwhm_deg), float(prep.input_fwhm_deg),
                        float(noise_uk_arcmin or 0.0), cosmology._params(cosmo), round(float(offset_deg), 9))


def filter_id(prep, table=None) -> str:
    """``name:hash`` of the filter a run applies (``none``; ``multipole:<sha>``; ``optimal:<sha>``),
    the same string in the provenance of data, simulation and injection tables."""
    name = getattr(prep, "filter", "none")
    if name == "none":
        return "none"
    if name == "multipole":
        return f"multipole:{filter_hash(filter_window(prep))}"
    if table is None:
        raise ValueError("the optimal filter's weight table is needed for its id")
    return f"optimal:{filter_hash(table)}"


def run_filter(cfg) -> np.ndarray | None:
    """:func:`ring_filter` for a run config: its prepare section, calibrate.noise_uk_arcmin (the
    survey's white noise level as the simulations add it), its cosmology and its search grid.  Data,
    simulation and injection searches all take the table from here."""
    return ring_filter(cfg.prepare, cfg.calibrate.noise_uk_arcmin, getattr(cfg, "cosmology", None),
                       grid_offset_deg(cfg.search))


def weighting_name(cfg) -> str:
    """The ring weighting a run's search uses: ``optimal`` (the filter's, per radius) or search.weighting."""
    return "optimal" if getattr(cfg.prepare, "filter", "none") == "optimal" else cfg.search.weighting


def matched_only(split: SourceSplit) -> SourceSplit:
    """The Sachs-Wolfe limit of a split: its match part is all there is (every view agrees)."""
    zero = np.zeros_like(split.match)
    return SourceSplit(lmax=split.lmax, total=split.match, match=split.match, doppler=zero, isw=zero,
                       match_doppler=zero, match_isw=zero, doppler_isw=zero, camb_total=split.camb_total)


def expected_pair_s(cfg, radius_deg, physics="full", noise_uk_arcmin=0.0, ring_table=None) -> float:
    """The model's expected S of a true circle pair of ``radius_deg`` in a run: the run's filter and ring
    weighting, prepared beam, ``noise_uk_arcmin`` white noise on the input, its search grid's offset,
    and ``physics`` (``sw``: every view agrees; ``full``: the source split)."""
    import healpy as hp

    prep = cfg.prepare
    split = source_split(prep.lmax, getattr(cfg, "cosmology", None))
    if physics == "sw":
        split = matched_only(split)
    bl = hp.gauss_beam(math.radians(prep.fwhm_deg), lmax=prep.lmax)
    w = weights_at(ring_table, radius_deg, 2 * prep.lmax + 2) if ring_table is not None else cfg.search.weighting
    nl = noise_spectrum(prep.lmax, prep.fwhm_deg, prep.input_fwhm_deg, noise_uk_arcmin)
    return expected_s(split, radius_deg, filter_window(prep), bl, nl, w,
                      fwhm_deg=prep.fwhm_deg, offset_deg=grid_offset_deg(cfg.search))[0]
