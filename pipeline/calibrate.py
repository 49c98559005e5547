"""Calibration: isotropic Gaussian skies through the identical prepare and search.

Each simulation is a statistically isotropic Gaussian sky with the configured
spectrum, plus white noise, masked by the data's mask, prepared with the
data's ``prepare`` section (monopole/dipole removal, band limit, beam) and
scanned with the data's ``search`` section.  From every simulation we keep the
*grid* peak of S at each radius and sense (``pool.peak_s``: the best S over
every centre pair and twist on the search grid, no off-grid refinement).  The
data are compared on the same footing: peaks by their grid S, candidates by
their ``s_grid`` column (the S of the grid pair the candidate was refined
from), never by the refined ``s``.

Null distribution and p-values
------------------------------
For radius r and sense f (a *cell*) let M_rf be the simulations' peak S
(N values).  Every p-value and threshold is empirical, from ranks
(:mod:`twinring.significance`):

* ``p_local(s) = (1 + #{M_rf >= s}) / (N + 1)``, never below 1/(N+1); a value
  beyond every simulation gets that floor and ``beyond_sims = True``.
* ``p_global``: the minimum-p look-elsewhere correction over all radii and both
  senses (leave-one-out local p of each simulation in every cell, its minimum
  the null draw; ties broken by the standardised excess z).  p_global >= p_local
  on every row and global thresholds >= local ones, by construction.
* A false-alarm rate a is usable only when N >= 1/a - 1; other thresholds are
  NaN with ``usable = False``, and nothing is called significant at a level the
  simulations cannot resolve (``calibrate.significance``).
* An extreme-value law (Gumbel by default, ``calibrate.tail``) is fitted to the
  simulations' largest standardised peaks and shown only as ``p_global_tail``
  and in fig_null, with its Kolmogorov-Smirnov p-value (optimistic, since the
  parameters come from the same values: Lilliefors); it never drives
  significance, the ranking or the bound.

Spectra (``calibrate.spectrum``)
--------------------------------
* ``data``: pseudo-C_l of the masked data map corrected for the mask's mode
  coupling (``calibrate.coupling: master``, :func:`data_spectrum`; ``fsky``
  divides by f_sky instead) and divided by the beam and high-pass window of
  ``prepare``, so that the prepare step puts them back.  The data's noise is
  part of this spectrum: leave ``calibrate.noise_uk_arcmin`` at 0 unless the
  noise must be added on top.
* ``theory``: CAMB's TT spectrum of the ``cosmology`` section (twinring.cosmology).
* ``file``: a table with columns l and C_l in uK^2 (ECSV/FITS with columns
  named ``l``/``ell`` and ``cl``/``c_l``/``C_l``/``tt``, or two plain-text columns).

Simulated maps are made at ``calibrate.sim_nside`` (0: what the prepared map
needs, see :func:`sim_nside_for`)
from a_lm up to ``prepare.lmax`` (no pixel window, like the prepared data),
with white noise of ``noise_uk_arcmin`` uK-arcmin (per-pixel rms = level /
pixel side in arcmin), and the data mask at that Nside.

Random numbers: simulation i draws from ``SeedSequence(calibrate.seed,
spawn_key=(i,))``, which is ``SeedSequence(seed).spawn(N)[i]``: a simulation
is the same whatever N, the backend or the order of the work.
"""
from __future__ import annotations

import dataclasses
import hashlib
import math
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import healpy as hp
import scipy.stats
from astropy.table import Table

from . import prepare as prep_mod
from . import significance as sig
from .filters import filter_id, filter_window, run_filter
from . import search as search_mod
from .config import InputError
from .skymap import SkyMap

NOT_IN_PEAKS = ("top", "refine", "suppress_deg", "keep_per_radius")   # search keys that leave grid peaks alone
THRESHOLDS = "thresholds.ecsv"
NULL_PEAKS = "null_peaks.ecsv"

_DISTS = {"gumbel": scipy.stats.gumbel_r, "genextreme": scipy.stats.genextreme}


# --------------------------------------------------------------------------- spectra and skies
def gaussian_alm(cl, lmax, rng) -> np.ndarray:
    """Isotropic Gaussian a_lm (healpy order) with <|a_lm|^2> = C_l, from a numpy Generator."""
    cl = np.asarray(cl, float)
    ell, m = hp.Alm.getlm(lmax)
    full = np.zeros(lmax + 1)
    full[: min(cl.size, lmax + 1)] = cl[: lmax + 1]
    amp = np.sqrt(np.maximum(full[ell], 0.0))
    re = rng.standard_normal(ell.size)
    im = rng.standard_normal(ell.size)
    return np.where(m == 0, re * amp, (re + 1j * im) * amp / math.sqrt(2.0)).astype(np.complex128)


def noise_sigma_pixel(noise_uk_arcmin, nside) -> float:
    """Per-pixel rms of white noise of the given level (uK-arcmin) at ``nside``."""
    return float(noise_uk_arcmin) / hp.nside2resol(nside, arcmin=True)


def wigner3j_zero_sq(lmax) -> callable:
    """A function ``(l1, l2, l3) -> (l1 l2 l3; 0 0 0)^2`` for integer arrays up to ``lmax`` each.

    The closed form (e.g. Edmonds 1957, *Angular Momentum in Quantum Mechanics*,
    eq. 3.7.17): zero unless L = l1 + l2 + l3 is even and the triangle holds;
    else with g = L/2 it is ``(L-2l1)! (L-2l2)! (L-2l3)! / (L+1)! * [g! / ((g-l1)! (g-l2)! (g-l3)!)]^2``,
    evaluated with a table of log factorials.
    """
    import scipy.special

    lf = scipy.special.gammaln(np.arange(3 * int(lmax) + 3) + 1.0)

    def f(l1, l2, l3):
        l1, l2, l3 = np.broadcast_arrays(np.asarray(l1), np.asarray(l2), np.asarray(l3))
        L = l1 + l2 + l3
        ok = (L % 2 == 0) & (l3 >= np.abs(l1 - l2)) & (l3 <= l1 + l2)
        g = L // 2
        Lc = np.where(ok, L, 0)
        a = np.where(ok, Lc - 2 * l1, 0)
        b = np.where(ok, Lc - 2 * l2, 0)
        c = np.where(ok, Lc - 2 * l3, 0)
        gc = np.where(ok, g, 0)
        val = (lf[a] + lf[b] + lf[c] - lf[Lc + 1]
               + 2.0 * (lf[gc] - lf[np.where(ok, gc - l1, 0)] - lf[np.where(ok, gc - l2, 0)]
                        - lf[np.where(ok, gc - l3, 0)]))
        return np.where(ok, np.exp(val), 0.0)

    return f


def coupling_matrix(mask_cl, lmax) -> np.ndarray:
    """The pseudo-C_l mode-coupling matrix of a mask (MASTER; Hivon et al. 2002, ApJ 567, 2, eq. A31).

    ``<pseudo C_l1> = sum_l2 M[l1, l2] C_l2`` with
    ``M[l1, l2] = (2 l2 + 1) / (4 pi) * sum_l3 (2 l3 + 1) W_l3 (l1 l2 l3; 0 0 0)^2``,
    ``W_l`` the mask's own pseudo-spectrum (``mask_cl``, l = 0..2 lmax; missing
    entries count as 0).  Returns the (lmax+1, lmax+1) matrix.
    """
    lmax = int(lmax)
    w = np.zeros(2 * lmax + 1)
    mc = np.asarray(mask_cl, float)[: 2 * lmax + 1]
    w[: mc.size] = mc
    w3 = (2 * np.arange(2 * lmax + 1) + 1.0) * w      # (2 l3 + 1) W_l3
    three = wigner3j_zero_sq(2 * lmax)
    ell = np.arange(lmax + 1)
    l3 = np.arange(2 * lmax + 1)
    M = np.zeros((lmax + 1, lmax + 1))
    for l1 in range(lmax + 1):
        sq = three(l1, ell[:, None], l3[None, :])              # (l2, l3)
        M[l1] = sq @ w3
    M *= (2 * ell[None, :] + 1.0) / (4.0 * math.pi)
    return M


def _hi_nside(nside, lmax):
    """Smallest Nside >= ``nside`` (a power of two) with 3 Nside - 1 >= 2 lmax: the mask's W_l to 2 lmax."""
    n = int(nside)
    while 3 * n - 1 < 2 * int(lmax):
        n *= 2
    return n


def fine_mask(mask, lmax):
    """The 0/1 mask repeated onto :func:`_hi_nside` (its geometry unchanged), fine enough for W_l to 2 lmax."""
    mask = (np.asarray(mask, float) > 0.5).astype(float)
    nside = hp.npix2nside(mask.size)
    nhi = _hi_nside(nside, lmax)
    mhi = hp.ud_grade(mask, nhi, order_in="RING", order_out="RING") if nhi != nside else mask
    return (mhi > 0.5).astype(float)


def pseudo_spectra(prepared):
    """(pseudo-C_l of the masked prepared map, mask pseudo-spectrum W_l to 2 lmax, f_sky).

    Both are computed at an Nside fine enough for the mask's spectrum to 2 lmax
    (:func:`_hi_nside`; the prepared mask repeated onto it, so its geometry is
    unchanged), the map from the prepared a_lm without pixel window.
    """
    lmax = int(prepared.lmax)
    mhi = fine_mask(prepared.mask if prepared.mask is not None else np.ones_like(prepared.map), lmax)
    fsky = float(mhi.mean())
    mp = hp.alm2map(prepared.alm, hp.npix2nside(mhi.size), lmax=lmax, mmax=lmax, pixwin=False) * mhi
    pseudo = hp.anafast(mp, lmax=lmax, pol=False, iter=3)
    wl = hp.anafast(mhi, lmax=2 * lmax, pol=False, iter=3)
    return pseudo, wl, fsky


def decouple(pseudo, mask_cl, lmin, lmax):
    """Full-sky C_l (l = 0..lmax, 0 below ``lmin``) solving ``pseudo = M C`` on lmin <= l <= lmax."""
    lo = max(int(lmin), 0)
    M = coupling_matrix(mask_cl, lmax)
    out = np.zeros(int(lmax) + 1)
    out[lo:] = np.linalg.solve(M[lo:, lo:], np.asarray(pseudo, float)[lo: int(lmax) + 1])
    return out


def input_spectrum_master(sky: SkyMap, prep, lmax):
    """Full-sky C_l (l = 0..lmax) of the input map as it is (its beam and pixel window included), MASTER-corrected.

    The pseudo-C_l of the masked input at the input Nside (with
    ``prep.remove_dipole`` the monopole and dipole fitted on the unmasked sky are
    removed first, as prepare does; that fit also removes the part of l = 2, 3
    that looks like a dipole on the cut sky, measured as -12 % on C_2 + C_3 for a
    |b| < 20 deg cut, which no decoupling can restore; what the fit leaves at
    l = 0, 1 is solved for as C_0 and C_1),
    decoupled with the exact coupling matrix of the input mask solved on
    ``0 <= l <= lmax_s`` (``lmax_s = min(3 Nside - 1, 1.5 lmax)``, so that power
    just above lmax and the residual monopole and dipole are modelled, not
    aliased into the kept multipoles).  Returns ``(cl, f_sky)``.
    """
    mask = (np.asarray(sky.mask) > 0.5).astype(float)
    nside = int(sky.nside)
    lmax = int(lmax)
    lmax_s = max(lmax, min(3 * nside - 1, lmax + max(16, lmax // 2)))
    if prep.remove_dipole:      # a large monopole/dipole would swamp l >= 2 through the coupling's rounding
        values, _ = prep_mod.remove_monopole_dipole(sky.values, mask)
    else:
        values = np.asarray(sky.values, float) * mask
    pseudo = hp.anafast(values, lmax=lmax_s, pol=False, iter=3)
    wl = hp.anafast(fine_mask(mask, lmax_s), lmax=2 * lmax_s, pol=False, iter=3)
    M = coupling_matrix(wl, lmax_s)
    cl = np.linalg.solve(M, pseudo)
    return cl[: lmax + 1], float(mask.mean())


def data_spectrum(prepared, prep, coupling="master", input_bl=None, sky=None) -> np.ndarray:
    """Sky C_l (uK^2, l = 0..lmax) of the input map (its beam included) from the prepared data.

    ``coupling = "master"`` (default): with the input ``sky`` given, the pseudo-C_l
    of the masked input corrected for the mask's mode coupling
    (:func:`input_spectrum_master`; MASTER, Hivon et al. 2002; the exact,
    unbinned coupling matrix), then its pixel window divided out when prepare
    divides it (``prep.input_pixwin``); without ``sky``, the pseudo-C_l of the
    masked prepared map decoupled on ``max(2, lmin) <= l <= lmax`` (biased low
    at l = 2, 3 by the monopole and dipole prepare removes).  ``"fsky"``: the pseudo-C_l divided by f_sky
    (mode coupling ignored: biased at low l by power leaking from neighbours).
    Then divided by the window prepare applied (target beam over the input's
    beam, ``input_bl`` when given, else ``prep.input_beam`` / ``input_fwhm_deg``),
    so that prepare puts it back.  Multipoles below ``prep.lmin`` and where the
    window is negligible are 0.  The data's noise is part of this spectrum.
    """
    lmax = int(prepared.lmax)
    mask = prepared.mask if prepared.mask is not None else np.ones_like(prepared.map)
    if float(np.mean(np.asarray(mask) > 0.5)) <= 0:
        raise InputError("prepared map: no valid pixel; allowed: a map with some valid pixels")
    lo = max(2, int(prep.lmin))
    if input_bl is None:
        input_bl = prep_mod.input_beam_window(prep, lmax)
    if coupling == "master" and sky is not None:
        est, _ = input_spectrum_master(sky, prep, lmax)
        if prep.input_pixwin:
            est = est / prep_mod.pixel_window(int(sky.nside), lmax) ** 2
        cl = np.zeros(lmax + 1)
        cl[lo:] = est[lo:]
        return np.maximum(cl, 0.0)
    if coupling == "fsky":
        fsky = float(np.mean(np.asarray(mask) > 0.5))
        est = hp.anafast(prepared.map * (np.asarray(mask) > 0.5), lmax=lmax, pol=False) / fsky
    else:
        pseudo, wl, fsky = pseudo_spectra(prepared)
        if fsky >= 1.0 - 1e-12:
            est = hp.alm2cl(prepared.alm)[: lmax + 1]
        else:
            est = decouple(pseudo, wl, lo, lmax)
    # the window prepare applied (from the input map's beam to the target beam): dividing it out
    # gives the spectrum of the input map, instrument beam included, which prepare then re-applies
    win = prep_mod.beam_and_highpass(lmax, prepared.fwhm_deg, 0, input_bl=input_bl)
    filt = filter_window(prep)               # prepare's multipole filter, re-applied to every simulation
    if filt is not None:
        win = win * filt
    cl = np.zeros(lmax + 1)
    ok = win**2 > 1e-12
    cl[ok] = est[ok] / win[ok] ** 2
    cl[:lo] = 0.0
    return np.maximum(cl, 0.0)


def theory_spectrum(lmax, cosmo=None) -> np.ndarray:
    """CAMB TT C_l (uK^2) of the configured cosmology (unlensed, as the topology skies)."""
    from .cosmology import isotropic_cl

    return isotropic_cl(int(lmax), cosmo)


def file_spectrum(path, lmax) -> np.ndarray:
    """C_l (uK^2, l = 0..lmax) from a table with columns l and C_l."""
    p = Path(path)
    if not p.exists():
        raise InputError(f"{p}: calibrate.spectrum_file not found; allowed: a table of l, C_l [uK^2]")
    ell = cl = None
    try:
        t = Table.read(p, format="ascii.ecsv") if p.suffix == ".ecsv" else (
            Table.read(p) if p.suffix.lower() in (".fits", ".fit") else None)
    except Exception as exc:
        raise InputError(f"{p}: calibrate.spectrum_file cannot be read ({exc.__class__.__name__}); "
                         "allowed: an ECSV/FITS table or two text columns l, C_l")
    if t is not None:
        names = {c.lower(): c for c in t.colnames}
        lk = next((names[k] for k in ("l", "ell") if k in names), None)
        ck = next((names[k] for k in ("cl", "c_l", "tt", "cl_tt") if k in names), None)
        if lk is None or ck is None:
            raise InputError(f"{p}: calibrate.spectrum_file has columns {', '.join(t.colnames)}; "
                             "allowed: columns l (or ell) and C_l (or cl, tt)")
        ell, cl = np.asarray(t[lk], float), np.asarray(t[ck], float)
    else:
        arr = prep_mod.text_columns(p, "calibrate.spectrum_file", 2, None,
                                    "columns l, C_l [uK^2] (any further columns are ignored)")
        ell, cl = arr[:, 0], arr[:, 1]
    if not np.all(np.isfinite(cl)) or np.any(cl < 0):
        raise InputError(f"{p}: calibrate.spectrum_file has negative or non-finite C_l; allowed: C_l >= 0 in uK^2")
    out = np.zeros(lmax + 1)
    li = np.round(ell).astype(int)
    sel = (li >= 0) & (li <= lmax)
    out[li[sel]] = cl[sel]
    missing = [l for l in range(2, lmax + 1) if l not in set(li[sel].tolist())]
    if missing:
        raise InputError(f"{p}: calibrate.spectrum_file lacks l = {missing[0]}"
                         f"{' and ' + str(len(missing) - 1) + ' more' if len(missing) > 1 else ''}; "
                         f"allowed: every l from 2 to prepare.lmax = {lmax}")
    return out


# --------------------------------------------------------------------------- one simulation
@dataclass(frozen=True)
class SimContext:
    """What every simulation needs (small: shipped to workers)."""
    cl: np.ndarray                 # sky C_l, l = 0..lmax (uK^2)
    nside: int                     # simulation Nside
    mask: np.ndarray | None        # data mask at ``nside`` (1 = use), None for full sky
    noise_sigma: object            # per-pixel noise rms (uK): a number (white) or an array (one per pixel)
    prep: object                   # PrepareSection
    search: object                 # SearchSection
    listed: object = None          # listed pairs table (family 'listed')
    seed: int = 0
    frame: str | None = None
    key: str = ""                  # identity of the whole setup (cache keys, stored results)
    maps: tuple = ()               # supplied simulation maps (calibrate.maps): simulation i is maps[i]
    noise_maps: tuple = ()         # noise maps added to the Gaussian signal skies (calibrate.noise_maps)
    map_section: object = None     # the data's MapSection (field, mask, threshold) for supplied maps
    input_bl: np.ndarray | None = None   # the input beam B_l read once from prepare.input_beam
    n_sims: int = 0                # N: len(maps), else calibrate.simulations
    noise_text: str = ""           # what noise the simulations get (log, summary, provenance)
    variance_checksum: str | None = None   # sha256 of calibrate.noise_variance_map
    compute: object = None         # ComputeSection (threads per simulation); not part of ``key``
    filt: np.ndarray | None = None   # prepare's multipole filter, computed once (filters.filter_window)
    ring_filter: np.ndarray | None = None   # the optimal filter's ring weights (filters.run_filter), computed once
    maps_digest: tuple = ()        # files_digest of ``maps`` (checksums, combined), hashed once
    noise_maps_digest: tuple = ()  # files_digest of ``noise_maps``


def sim_rng(seed, index) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(int(index),)))


def _supplied(ctx: SimContext, path, what):
    """A supplied map (simulation or noise) read like the data: same field, the data mask applied."""
    from .skymap import load_map

    m = ctx.map_section
    sky = load_map(path, field=m.field if m is not None else 0, mask_path=m.mask if m is not None else None,
                   mask_field=m.mask_field if m is not None else 0,
                   mask_threshold=m.mask_threshold if m is not None else 0.5,
                   allow_polarisation=bool(m.allow_polarisation) if m is not None else False)
    if sky.nside != int(ctx.nside):
        raise InputError(f"{path}: {what} has Nside {sky.nside}; allowed: the simulations' Nside {ctx.nside} "
                         "(the data map's, or calibrate.sim_nside)")
    return sky


def simulate_sky(ctx: SimContext, index) -> SkyMap:
    """Simulated input map i (uK, RING, masked) as a SkyMap for :func:`twinring.prepare.prepare_map`.

    Supplied simulations (``ctx.maps``) are read like the data (field, unit,
    ordering, the data's mask and the data's own invalid pixels).  Gaussian
    skies get the input's pixel window when prepare divides it out
    (``prepare.input_pixwin``), then noise: noise map i (``ctx.noise_maps``)
    or ``noise_sigma`` (white, or one rms per pixel) times a standard normal.
    """
    mask = np.ones(hp.nside2npix(int(ctx.nside))) if ctx.mask is None else np.asarray(ctx.mask, float)
    if ctx.maps:
        sky = _supplied(ctx, ctx.maps[int(index)], "calibrate.maps simulation")
        use = np.asarray(sky.mask, float) * mask
        return SkyMap(values=sky.values * use, mask=use, nside=sky.nside, unit_in=sky.unit_in, frame=ctx.frame,
                      checksum=sky.checksum, notes=[], path=str(ctx.maps[int(index)]))
    rng = sim_rng(ctx.seed, index)
    lmax = int(ctx.prep.lmax)
    alm = gaussian_alm(ctx.cl, lmax, rng)
    if getattr(ctx.prep, "input_pixwin", False):
        hp.almxfl(alm, prep_mod.pixel_window(int(ctx.nside), lmax), inplace=True)
    m = hp.alm2map(alm, ctx.nside, lmax=lmax, mmax=lmax, pixwin=False)
    if ctx.noise_maps:
        noise = _supplied(ctx, ctx.noise_maps[int(index)], "calibrate.noise_maps noise map")
        m = m + noise.values
        mask = mask * noise.mask
    else:
        sigma = np.asarray(ctx.noise_sigma, float)
        if np.any(sigma > 0):
            m = m + sigma * rng.standard_normal(m.size)
    return SkyMap(values=m * mask, mask=mask, nside=int(ctx.nside), unit_in="uK", frame=ctx.frame,
                  checksum="", notes=[], path=f"simulation {int(index)}")


def grid_peaks(prepared, scfg, listed=None, key="", compute=None, ring_filter=None):
    """Grid peaks of S (n_radii, 2) of a prepared map: the search's scan and combine, no refinement.

    ``compute``: the config's compute section; its ``threads`` (0 = 1) are used by the ring synthesis,
    the twist FFTs and the screen (the grid peaks do not depend on the number of threads).
    ``ring_filter``: the optimal filter's weight table (twinring.filters.run_filter) or None.
    """
    plan = search_mod.make_plan(prepared, scfg, compute, listed, key=key, ring_filter=ring_filter)
    results = [search_mod.scan_chunk(plan, c) for c in plan.chunk_ids()]
    pool = search_mod.combine(plan, results)
    search_mod.clear_ring_caches()
    return plan, pool


def null_peaks(ctx: SimContext, index) -> np.ndarray:
    """Work unit: grid peaks (n_radii, 2) of simulation ``index`` (``ctx.compute``: threads per unit)."""
    sky = simulate_sky(ctx, index)
    threads = max(1, int(getattr(ctx.compute, "threads", 0) or 1))
    prepared = prep_mod.prepare_map(sky, ctx.prep, nthreads=threads, input_bl=ctx.input_bl, filt=ctx.filt)
    _, pool = grid_peaks(prepared, ctx.search, ctx.listed, key=f"{ctx.key}-sim{int(index)}", compute=ctx.compute,
                         ring_filter=ctx.ring_filter)
    return np.asarray(pool.peak_s, float)


# --------------------------------------------------------------------------- extreme-value fits
@dataclass(frozen=True)
class TailFit:
    """An extreme-value law fitted to maxima, with its Kolmogorov-Smirnov check."""
    kind: str
    params: tuple
    ks_stat: float
    ks_p: float
    n: int

    @property
    def dist(self):
        return _DISTS[self.kind](*self.params)

    def sf(self, x):
        return self.dist.sf(x)

    def isf(self, q):
        return self.dist.isf(q)

    def pdf(self, x):
        return self.dist.pdf(x)


def fit_tail(x, kind="gumbel") -> TailFit:
    """Maximum-likelihood extreme-value fit (scipy.stats) of the finite values of ``x``."""
    x = np.asarray(x, float)
    x = x[np.isfinite(x)]
    if x.size < 3 or np.ptp(x) <= 0:
        return TailFit(kind, (), float("nan"), float("nan"), int(x.size))
    dist = _DISTS[kind]
    if kind == "genextreme":
        c0, loc0, sc0 = 0.1, *scipy.stats.gumbel_r.fit(x)
        params = tuple(float(v) for v in dist.fit(x, c0, loc=loc0, scale=sc0))
    else:
        params = tuple(float(v) for v in dist.fit(x))
    ks = scipy.stats.kstest(x, dist(*params).cdf)
    return TailFit(kind, params, float(ks.statistic), float(ks.pvalue), int(x.size))


# --------------------------------------------------------------------------- the null model
@dataclass
class NullModel:
    """The simulations' grid peaks and the Monte Carlo p-values and thresholds derived from them.

    Cells are (radius, sense) pairs.  All p-values and thresholds are empirical
    (:mod:`twinring.significance`); the extreme-value fits (``local_fits``,
    ``global_fit`` of the largest standardised peak ``zmax``) are descriptive
    only and feed nothing but the ``p_global_tail`` column and fig_null.
    """
    radii: np.ndarray          # (R,) degrees
    peaks: np.ndarray          # (N, R, 2)
    tail: str = "gumbel"

    def __post_init__(self):
        P = np.where(np.isfinite(self.peaks), self.peaks, np.nan)
        self.peaks = P
        n, R, _ = P.shape
        with np.errstate(invalid="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            self.mu = np.nanmean(P, axis=0) if n else np.full(P.shape[1:], np.nan)
            self.sigma = np.nanstd(P, axis=0, ddof=1) if n > 1 else np.full(P.shape[1:], np.nan)
        self.sigma = np.where(self.sigma > 0, self.sigma, np.nan)
        z = (P - self.mu) / self.sigma
        self.zmax = np.array([np.nanmax(r) if np.any(np.isfinite(r)) else np.nan for r in z.reshape(n, -1)])
        self.null_minp, self.null_minp_z = sig.min_p_null(P.reshape(n, -1))
        self.local_fits = [[fit_tail(P[:, ir, f], self.tail) for f in (0, 1)] for ir in range(len(self.radii))]
        self.global_fit = fit_tail(self.zmax, self.tail)

    @property
    def n_sims(self) -> int:
        return int(self.peaks.shape[0])

    @property
    def p_floor(self) -> float:
        return 1.0 / (self.n_sims + 1)

    def resolvable(self, rate) -> bool:
        return sig.resolvable(rate, self.n_sims)

    def radius_index(self, radius_deg):
        """Index of the grid radius nearest to ``radius_deg``."""
        return int(np.argmin(np.abs(self.radii - float(radius_deg))))

    def z(self, ir, f, s):
        return float((s - self.mu[ir, f]) / self.sigma[ir, f]) if np.isfinite(self.sigma[ir, f]) else float("nan")

    def p_local(self, ir, f, s):
        """(p_local, beyond_sims) of grid value ``s`` at radius index ``ir``, sense ``f``."""
        p, beyond = sig.mc_pvalue(self.peaks[:, ir, f], s)
        return float(p), bool(beyond)

    def p_global(self, ir, f, s):
        """Family-wise p of ``s`` over every radius and sense (min-p method)."""
        return sig.global_pvalue(self.p_local(ir, f, s)[0], self.z(ir, f, s), self.null_minp, self.null_minp_z)

    def p_global_tail(self, ir, f, s):
        """Descriptive only: the extreme-value fit to ``zmax`` evaluated at this value's z."""
        zz = self.z(ir, f, s)
        return float(self.global_fit.sf(zz)) if self.global_fit.params and np.isfinite(zz) else float("nan")

    def threshold(self, ir, f, rate, which="local"):
        """S that a grid value must exceed for p <= ``rate`` at (``ir``, ``f``); NaN if N cannot resolve it."""
        if not self.resolvable(rate):
            return float("nan")
        v = self.peaks[:, ir, f]
        if which == "global":
            cands = np.concatenate([v, self.mu[ir, f] + self.sigma[ir, f] * self.null_minp_z])
            return sig.smallest_exceeding(cands, lambda x: self.p_global(ir, f, x), rate)
        return sig.smallest_exceeding(v, lambda x: self.p_local(ir, f, x)[0], rate)

    def thresholds_table(self, rates) -> Table:
        rows = []
        for ir, r in enumerate(self.radii):
            for f in (0, 1):
                fit = self.local_fits[ir][f]
                n_cell = int(np.sum(np.isfinite(self.peaks[:, ir, f])))
                for a in rates:
                    rows.append((float(r), bool(f), float(a), self.threshold(ir, f, a), self.threshold(ir, f, a, "global"),
                                 self.resolvable(a), n_cell, float(self.mu[ir, f]), float(self.sigma[ir, f]),
                                 *(_loc_scale(fit)), fit.ks_p))
        t = Table(rows=rows, names=["radius_deg", "flip", "false_alarm", "s_threshold", "s_threshold_global",
                                    "usable", "n_sims", "s_mean", "s_std", "fit_loc", "fit_scale", "fit_ks_p"],
                  dtype=[float, bool, float, float, float, bool, int, float, float, float, float, float])
        for c in ("s_threshold", "s_threshold_global", "s_mean", "s_std", "fit_loc", "fit_scale", "fit_ks_p"):
            t[c].info.format = ".5f"
        t["radius_deg"].unit = "deg"
        return t

    def meta(self, rates) -> dict:
        ks = np.array([f.ks_p for row in self.local_fits for f in row], float)
        out = {"n_sims": self.n_sims, "p_floor": self.p_floor, "tail": self.tail,
               "p_values": "empirical: (1 + #sims at or above) / (N + 1); never below 1/(N + 1)",
               "global_method": "minimum p over radii and senses, leave-one-out per simulation, ties broken by z",
               "resolvable_rates": [float(a) for a in rates if self.resolvable(a)],
               "unresolvable_rates": [float(a) for a in rates if not self.resolvable(a)],
               "tail_fit_use": "descriptive only (p_global_tail, fig_null); never significance, ranking or bound",
               "global_fit_params": list(self.global_fit.params), "global_fit_ks_stat": self.global_fit.ks_stat,
               "global_fit_ks_p": self.global_fit.ks_p,
               "local_fit_ks_p_min": float(np.nanmin(ks)) if np.any(np.isfinite(ks)) else float("nan"),
               "local_fit_ks_p_median": float(np.nanmedian(ks)) if np.any(np.isfinite(ks)) else float("nan"),
               "comparison": "grid S (peak_s / s_grid), no off-grid refinement, in data and simulations"}
        return out

    def null_table(self) -> Table:
        n, R, _ = self.peaks.shape
        sim, ir, f = np.meshgrid(np.arange(n), np.arange(R), np.arange(2), indexing="ij")
        t = Table()
        t["sim"] = sim.ravel()
        t["radius_deg"] = self.radii[ir.ravel()]
        t["radius_deg"].unit = "deg"
        t["flip"] = f.ravel().astype(bool)
        t["s_max"] = self.peaks.ravel()
        t["s_max"].info.format = ".6f"
        return t


def resolution_lines(n_sims, rates):
    """Plain statements of which false-alarm rates ``n_sims`` simulations resolve."""
    floor = 1.0 / (n_sims + 1)
    lines = [f"{n_sims} simulations: smallest possible p = 1/{n_sims + 1} = {floor:.3g}"]
    for a in sorted(set(float(x) for x in rates)):
        if not sig.resolvable(a, n_sims):
            lines.append(f"false-alarm rate {a:g} is not resolved by {n_sims} simulations "
                         f"(needs at least {sig.sims_needed(a)}); its thresholds are marked usable = False")
    return lines


def _loc_scale(fit):
    if not fit.params:
        return float("nan"), float("nan")
    return float(fit.params[-2]), float(fit.params[-1])


def null_model_from_table(t: Table, tail="gumbel") -> NullModel:
    """Rebuild the null model from ``null_peaks.ecsv``."""
    radii = np.unique(np.asarray(t["radius_deg"], float))
    n = int(np.max(t["sim"])) + 1 if len(t) else 0
    peaks = np.full((n, radii.size, 2), np.nan)
    ir = np.searchsorted(radii, np.asarray(t["radius_deg"], float))
    peaks[np.asarray(t["sim"], int), ir, np.asarray(t["flip"], bool).astype(int)] = np.asarray(t["s_max"], float)
    return NullModel(radii, peaks, tail=str(t.meta.get("tail", tail)))


def load_null_model(run_dir) -> NullModel:
    from .results import read_table

    p = Path(run_dir) / NULL_PEAKS
    if not p.exists():
        raise InputError(f"{p}: calibration not found; allowed: run `twinring calibrate` first")
    return null_model_from_table(read_table(p, "calibration table"))


# --------------------------------------------------------------------------- p-values on tables
def annotate(table: Table, model: NullModel, s_col="s_grid", level=None) -> Table:
    """Copy of a candidates or peaks table with calibrated columns, rows in the calibrated ranking.

    Adds ``z``, ``p_local``, ``p_global`` (empirical, never below 1/(N+1)),
    ``beyond_sims`` (no simulation reached the value at its radius and sense),
    ``p_global_tail`` (descriptive extreme-value extrapolation, drives nothing)
    and, with a significance ``level``, ``significant`` (p_global <= level, and
    only when N resolves that level).  Rows are sorted by p_global, then z
    (larger first), then grid S (larger first).
    """
    t = table.copy()
    cols = {k: [] for k in ("z", "p_local", "p_global", "beyond_sims", "p_global_tail")}
    for row in t:
        ir = model.radius_index(row["radius_deg"])
        f = int(bool(row["flip"]))
        s = float(row[s_col])
        pl, beyond = model.p_local(ir, f, s)
        cols["z"].append(model.z(ir, f, s))
        cols["p_local"].append(pl)
        cols["beyond_sims"].append(beyond)
        cols["p_global"].append(model.p_global(ir, f, s))
        cols["p_global_tail"].append(model.p_global_tail(ir, f, s))
    for name in ("z", "p_local", "p_global", "beyond_sims", "p_global_tail", "significant",
                 "p_local_method", "p_global_method"):
        if name in t.colnames:
            t.remove_column(name)
    for name, fmt in (("z", ".4f"), ("p_local", ".6g"), ("p_global", ".6g"), ("p_global_tail", ".3g")):
        t[name] = np.asarray(cols[name], float)
        t[name].info.format = fmt
    t["beyond_sims"] = np.asarray(cols["beyond_sims"], bool)
    if level is not None:
        ok = model.resolvable(level)
        t["significant"] = np.asarray([ok and np.isfinite(p) and p <= level for p in cols["p_global"]], bool)
    if len(t):
        t = t[rank_order(t, s_col)]
        if "rank" in t.colnames:
            t["rank"] = np.arange(1, len(t) + 1)
    return t


def rank_order(table: Table, s_col="s_grid") -> np.ndarray:
    """Row order of the calibrated ranking: p_global up, then z down, then grid S down (NaNs last)."""
    p = np.nan_to_num(np.asarray(table["p_global"], float), nan=np.inf)
    z = np.nan_to_num(np.asarray(table["z"], float), nan=-np.inf)
    s = np.nan_to_num(np.asarray(table[s_col], float), nan=-np.inf)
    return np.lexsort((-s, -z, p))


def best_global(table: Table):
    """Row of a table annotated by :func:`annotate` that ranks first (smallest p_global, ties: larger z, S)."""
    if len(table) == 0:
        return None
    col = "s_grid" if "s_grid" in table.colnames else "s"
    return table[int(rank_order(table, col)[0])]


# --------------------------------------------------------------------------- the stage
def sim_nside_for(cfg, sky_nside) -> int:
    """Nside of the simulated maps: ``calibrate.sim_nside``, or by default what the prepared map needs.

    The search sees only the prepared a_lm (l <= prepare.lmax) at ``prepare.nside``, so by default the
    simulations are made at ``prepare.nside``, raised to the smallest power of two with
    2 Nside >= prepare.lmax (where map2alm with its iterations is accurate), and never above the input
    map's Nside (which the data itself was analysed from).
    """
    n = int(cfg.calibrate.sim_nside or 0)
    if n == 0:
        lmax = int(cfg.prepare.lmax)
        need = max(int(cfg.prepare.nside), 1 << max(0, math.ceil(lmax / 2) - 1).bit_length())
        n = min(int(sky_nside), need)
    if 3 * n - 1 < cfg.prepare.lmax:
        raise InputError(f"{cfg.source}: calibrate.sim_nside: found {n}; allowed: 0 or a power of two with "
                         f"3*sim_nside-1 >= prepare.lmax = {cfg.prepare.lmax}")
    return n


def sky_spectrum(cfg, prepared, sky=None) -> np.ndarray:
    """The simulations' C_l (uK^2): the data's (mode coupling corrected), CAMB's or a file's times the input beam^2."""
    c = cfg.calibrate
    lmax = int(cfg.prepare.lmax)
    if c.spectrum == "data":
        return data_spectrum(prepared, cfg.prepare, coupling=c.coupling, sky=sky)
    if c.spectrum == "theory":
        cl = theory_spectrum(lmax, cfg.cosmology)
    else:
        cl = file_spectrum(c.spectrum_file, lmax)
    cl = np.asarray(cl, float)[: lmax + 1].copy()
    # sky spectra seen through the input map's own beam (its pixel window is added to each simulated map)
    cl *= prep_mod.input_beam_window(cfg.prepare, lmax)[: cl.size] ** 2
    return cl


_GLOB_CHARS = set("*?[")


def expand_paths(patterns, key) -> list:
    """Files of a glob or list (already relative to the config): sorted per pattern, each once, all existing."""
    import glob

    out = []
    for pat in patterns or ():
        if _GLOB_CHARS & set(str(pat)):
            hits = sorted(glob.glob(str(pat)))
            if not hits:
                raise InputError(f"{pat}: {key}: the pattern matches no file; allowed: a glob matching HEALPix FITS "
                                 "maps, or a list of files")
            out.extend(hits)
        else:
            if not Path(pat).is_file():
                raise InputError(f"{pat}: {key}: file not found; allowed: existing HEALPix FITS maps")
            out.append(str(pat))
    seen, uniq = set(), []
    for p in out:
        r = str(Path(p).resolve())
        if r not in seen:
            seen.add(r)
            uniq.append(p)
    return uniq


def files_digest(paths) -> tuple:
    """(sha256 checksums of the files, one sha256 of them all in order): provenance of supplied maps."""
    from .results import file_checksum

    sums = [file_checksum(p) for p in paths]
    return sums, hashlib.sha256("\n".join(sums).encode()).hexdigest()[:16]


def noise_for(cfg, nside):
    """Per-pixel noise rms of the Gaussian simulations at ``nside`` and a statement of it.

    Returns ``(sigma, text, variance_checksum)``: ``sigma`` a number (white
    noise of ``calibrate.noise_uk_arcmin``) or an array (``calibrate.noise_variance_map``,
    variance or hit counts, regridded to ``nside`` with the pixel-area scaling).
    """
    c = cfg.calibrate
    if c.noise_variance_map:
        from .results import file_checksum
        from .skymap import load_noise_variance, regrid_variance

        var, vn, notes = load_noise_variance(c.noise_variance_map, c.noise_variance_field, c.noise_per_hit_uk)
        var = regrid_variance(var, nside)
        sigma = np.sqrt(var)
        seen = sigma > 0
        text = (f"inhomogeneous noise from {Path(c.noise_variance_map).name} (Nside {vn}"
                f"{', regridded to ' + str(nside) if vn != nside else ''}): per-pixel rms median "
                f"{float(np.median(sigma[seen])):.4g} uK, range {float(sigma[seen].min()):.4g}-"
                f"{float(sigma[seen].max()):.4g} uK")
        return sigma, "; ".join(notes[-1:] + [text]), file_checksum(c.noise_variance_map)
    sigma = noise_sigma_pixel(c.noise_uk_arcmin, nside)
    return sigma, (f"white noise {c.noise_uk_arcmin:g} uK-arcmin = {sigma:.4g} uK per pixel at Nside {nside}"
                   if c.noise_uk_arcmin > 0 else "no noise added to the simulations"), None


def make_context(cfg, sky: SkyMap, prepared, listed=None) -> SimContext:
    """The simulation context for the config, the data SkyMap and its prepared version."""
    c = cfg.calibrate
    maps = expand_paths(c.maps, "calibrate.maps") if c.maps else []
    noise_maps = expand_paths(c.noise_maps, "calibrate.noise_maps") if c.noise_maps else []
    data_path = str(Path(sky.path).resolve()) if sky.path else None
    for p in maps + noise_maps:
        if data_path and str(Path(p).resolve()) == data_path:
            raise InputError(f"{p}: calibrate.maps / noise_maps includes the data map itself; allowed: simulations "
                             "independent of the data")
    if maps:
        if len(maps) < 2:
            raise InputError(f"{cfg.source}: calibrate.maps: found {len(maps)} map; allowed: at least 2 simulation "
                             "maps (N = their count; p is never below 1/(N + 1))")
        nside = int(sky.nside)                 # processed exactly like the data
        n_sims = len(maps)
        cl = np.zeros(int(cfg.prepare.lmax) + 1)
        sigma, noise_text, var_sum = 0.0, "supplied simulation maps carry their own noise", None
    else:
        nside = sim_nside_for(cfg, sky.nside)
        n_sims = int(c.simulations)
        cl = sky_spectrum(cfg, prepared, sky)
        if noise_maps:
            if len(noise_maps) < n_sims:
                raise InputError(f"{cfg.source}: calibrate.noise_maps: found {len(noise_maps)} map(s) for "
                                 f"{n_sims} simulations; allowed: at least calibrate.simulations noise maps "
                                 "(simulation i gets noise map i)")
            noise_maps = noise_maps[:n_sims]
            sigma, noise_text, var_sum = 0.0, f"{n_sims} supplied noise maps added to the Gaussian skies", None
        else:
            sigma, noise_text, var_sum = noise_for(cfg, nside)
    mask = None
    if np.any(sky.mask <= 0.5):
        if nside == int(prepared.nside) and nside != sky.nside and not cfg.prepare.mask_widen_fwhm:
            # the data's own prepared mask (not when prepare widens masks: it would widen it twice)
            mask = (np.asarray(prepared.mask) > 0.5).astype(float)
        else:
            mask = prep_mod.regrid_mask(sky.mask, nside, keep=0.5) if nside != sky.nside else (sky.mask > 0.5).astype(float)
    input_bl = prep_mod.read_beam_cached(cfg.prepare.input_beam, int(cfg.prepare.lmax)) if cfg.prepare.input_beam \
        else None
    h = hashlib.sha256()
    # everything that changes a simulation's grid peaks (not search.top / refine / suppression)
    grid = {k: v for k, v in dataclasses.asdict(cfg.search).items() if k not in NOT_IN_PEAKS}
    h.update(repr((dataclasses.asdict(cfg.prepare), sorted(grid.items()))).encode())
    sig_key = float(sigma) if np.ndim(sigma) == 0 else hashlib.sha256(np.ascontiguousarray(sigma).tobytes()).hexdigest()
    h.update(repr((c.seed, c.spectrum, nside, sig_key)).encode())
    if c.spectrum == "data" and c.coupling != "master":
        h.update(repr(c.coupling).encode())
    h.update(np.ascontiguousarray(cl).tobytes())
    maps_digest = files_digest(maps) if maps else ()
    noise_digest = files_digest(noise_maps) if noise_maps else ()
    if maps or noise_maps:
        h.update(repr((maps_digest[1] if maps else "", noise_digest[1] if noise_maps else "",
                       cfg.map.field, cfg.map.mask_field, cfg.map.mask_threshold)).encode())
    if input_bl is not None:
        h.update(np.ascontiguousarray(input_bl).tobytes())
    if mask is not None:
        h.update(np.packbits(mask > 0.5).tobytes())
    if listed is not None:
        for col in ("lon1_deg", "lat1_deg", "lon2_deg", "lat2_deg"):
            h.update(np.asarray(listed[col], float).tobytes())
    ctx = SimContext(cl=cl, nside=nside, mask=mask, noise_sigma=sigma, prep=cfg.prepare, search=cfg.search,
                     listed=listed, seed=int(c.seed), frame=sky.frame, key=h.hexdigest()[:16], maps=tuple(maps),
                     noise_maps=tuple(noise_maps), map_section=cfg.map, input_bl=input_bl, n_sims=n_sims,
                     noise_text=noise_text, variance_checksum=var_sum, compute=cfg.compute,
                     maps_digest=maps_digest, noise_maps_digest=noise_digest, filt=filter_window(cfg.prepare),
                     ring_filter=run_filter(cfg))
    return ctx


def noise_statement(cfg, ctx: SimContext) -> list:
    """Log and summary lines: the noise the simulations really get, and the noise inside a 'data' spectrum."""
    c = cfg.calibrate
    lines = [f"simulation noise: {ctx.noise_text}"]
    if not ctx.maps and c.spectrum == "data":
        lines.append("spectrum 'data' is the data map's own spectrum and already contains the data's noise "
                     "(its noise is part of the Gaussian skies)")
        if c.noise_uk_arcmin > 0 or c.noise_variance_map or ctx.noise_maps:
            lines.append("warning: noise is added on top of spectrum 'data', which already contains the data's "
                         "noise: the simulations are noisier than the data (use spectrum 'theory' or 'file' with "
                         "added noise, or no added noise with 'data')")
    return lines


def sims_provenance(ctx: SimContext) -> dict:
    """Provenance of supplied simulation and noise maps (count, checksums) and of a noise variance map."""
    out = {}
    if ctx.maps:
        sums, allsum = ctx.maps_digest
        out.update(sim_maps_count=len(ctx.maps), sim_maps_sha256=allsum, sim_maps_checksums=sums,
                   sim_maps_first=str(ctx.maps[0]))
    if ctx.noise_maps:
        sums, allsum = ctx.noise_maps_digest
        out.update(noise_maps_count=len(ctx.noise_maps), noise_maps_sha256=allsum, noise_maps_checksums=sums,
                   noise_maps_first=str(ctx.noise_maps[0]))
    if ctx.variance_checksum:
        out["sha256_noise_variance_map"] = ctx.variance_checksum
    out["simulation_noise"] = ctx.noise_text
    out["filter"] = filter_id(ctx.prep, ctx.ring_filter)
    out["null_kind"] = "supplied simulation maps" if ctx.maps else "isotropic Gaussian skies"
    return out


SIM_TAG = "sims"
CAL_SHARD = "calibrate_shard.json"


def run_simulations(ctx: SimContext, n, compute=None, store_dir=None, progress=None, log=None,
                    shard=None) -> np.ndarray:
    """Grid peaks of simulations 0..n-1: array (n, n_radii, 2) (with ``shard``: only that shard's, in order).

    With ``store_dir`` each simulation's peaks are kept in ``store_dir/sims/``
    under the setup key, so an interrupted calibration resumes and a larger
    ``simulations`` reuses the ones already made.
    """
    from .execute import run_units

    res = run_units(null_peaks, ctx, list(range(int(n))), compute=compute, store_dir=store_dir,
                    tag=SIM_TAG, key=ctx.key, progress=progress, log=log, shard=shard)
    return np.stack([np.asarray(res[i], float) for i in sorted(res)])


def calibrate_shard(cfg, run, sky, prepared, shard):
    """Only the simulations of ``shard`` (K, N), stored in the run dir with a manifest; no thresholds."""
    import json

    from .execute import shard_units
    from .results import write_text
    from .inputs import listed_pairs

    ctx = make_context(cfg, sky, prepared, listed_pairs(cfg))
    n = int(ctx.n_sims)
    peaks = run_simulations(ctx, n, compute=cfg.compute, store_dir=run.dir, progress=run.progress,
                            log=run.log, shard=shard)
    mine = [int(u) for u in shard_units(list(range(n)), shard)]
    write_text(run.dir / CAL_SHARD, json.dumps({"setup": ctx.key, "config_hash": cfg.hash(), "shard": list(shard),
                                                "simulations": n, "units": mine}) + "\n")
    return [f"calibration shard {shard[0]}/{shard[1]}: {peaks.shape[0]} of {n} simulations stored in {run.dir};"
            f" combine the shards with `twinring merge DIR... --out DIR`"]


def merge_calibration_shards(dirs, out, force=False):
    """Collect the simulations of every calibration shard into ``out`` and calibrate there (no sim is rerun)."""
    from . import execute
    from .config import load_config
    from .rundir import CONFIG_NAME, open_run
    from .store import read_shard_json, refuse_out_among_inputs

    dirs = [Path(d).expanduser() for d in dirs]
    refuse_out_among_inputs(out, dirs, "calibration shard")
    allowed = f"the {CAL_SHARD} written by `twinring calibrate --shard K/N`"
    mans = []
    for d in dirs:
        p = Path(d) / CAL_SHARD
        if not p.exists():
            raise InputError(f"{d}: no {CAL_SHARD}; allowed: output directories of `twinring calibrate --shard K/N`")
        m = read_shard_json(p, "calibration shard manifest", allowed, ("setup", "config_hash", "shard", "units"))
        if not isinstance(m["setup"], str) or not all(isinstance(u, int) for u in m["units"]):
            raise InputError(f"{p}: calibration shard manifest damaged (setup or units of the wrong type); "
                             f"allowed: {allowed}")
        mans.append((Path(d), m))
    d0, m0 = mans[0]
    seen = {}
    for d, m in mans:
        if (m["setup"], m["config_hash"], m["shard"][1]) != (m0["setup"], m0["config_hash"], m0["shard"][1]):
            raise InputError(f"{d}: calibration shard of another config or split (setup {m['setup']}, shard "
                             f"{m['shard'][0]}/{m['shard'][1]}) than {d0}; allowed: shards of one config and split")
        if m["shard"][0] in seen:
            raise InputError(f"{d}: duplicate calibration shard {m['shard'][0]}/{m['shard'][1]} (also in "
                             f"{seen[m['shard'][0]]}); allowed: each shard once")
        seen[m["shard"][0]] = d
    n_shards = m0["shard"][1]
    missing = [k for k in range(n_shards) if k not in seen]
    if missing:
        raise InputError(f"merge: calibration shard(s) {', '.join(f'{k}/{n_shards}' for k in missing)} missing; "
                         f"allowed: one directory for each shard 0/{n_shards} .. {n_shards - 1}/{n_shards}")
    cfg = load_config(d0 / CONFIG_NAME)
    got = {}
    for d, m in mans:
        got.update(execute.load_shard_units(d, SIM_TAG, m["units"], m0["setup"],
                                            f"calibration shard {m['shard'][0]}/{n_shards}", "simulation"))
    run = open_run(cfg, out, force, "merge")
    for u, res in got.items():
        execute.store_unit(run.dir, SIM_TAG, u, res, m0["setup"])
    return run, calibrate_run(cfg, run)


def load_data(cfg):
    """The data SkyMap and its prepared version."""
    from .skymap import load_config_map

    m = cfg.map
    if not m.path:
        raise InputError(f"{cfg.source or '<config>'}: map.path: found null; allowed: a HEALPix FITS file path")
    sky = load_config_map(m)
    return sky, prep_mod.prepare_map(sky, cfg.prepare)


def check_grid(table, model, path):
    radii = np.unique(np.asarray(table["radius_deg"], float))
    if radii.size and (radii.size != model.radii.size or not np.allclose(radii, model.radii, atol=1e-6)):
        raise InputError(f"{path}: radii {radii.min():g}-{radii.max():g} deg ({radii.size}) differ from the "
                         f"calibration's ({model.radii.size}); allowed: a search with the config's search.radius_deg")


def calibrate_run(cfg, run, sky=None, prepared=None):
    """The calibrate stage on an open run: simulations, thresholds, p-values. Returns summary lines."""
    import time

    from .results import provenance, read_table, write_table
    from .inputs import input_files, listed_pairs

    c = cfg.calibrate
    if c.spectrum == "file":
        file_spectrum(c.spectrum_file, int(cfg.prepare.lmax))        # check before any work
    if sky is None or prepared is None:
        sky, prepared = load_data(cfg)
    listed = listed_pairs(cfg)
    ctx = make_context(cfg, sky, prepared, listed)
    noise_lines = noise_statement(cfg, ctx)
    for line in noise_lines:
        run.log(line)
    if ctx.maps:
        run.log(f"{ctx.n_sims} supplied simulation maps (calibrate.maps; N = their count, calibrate.simulations "
                f"not used) at Nside {ctx.nside}, masked, prepared and searched like the data (setup {ctx.key})")
        if c.sim_nside:
            run.log("note: calibrate.sim_nside is not used with calibrate.maps (they are read at their own Nside)")
    else:
        spec = c.spectrum + (f" ({'mode coupling corrected' if c.coupling == 'master' else 'f_sky rescaled'})"
                             if c.spectrum == "data" else "")
        run.log(f"{ctx.n_sims} Gaussian simulations at Nside {ctx.nside}, spectrum {spec}, seed {c.seed} "
                f"(setup {ctx.key})")
    t0 = time.time()
    peaks = run_simulations(ctx, ctx.n_sims, compute=cfg.compute, store_dir=run.dir, progress=run.progress,
                            log=run.log)
    dt = time.time() - t0
    model = NullModel(np.asarray(cfg.search.radii_deg(), float), peaks, tail=c.tail)
    inputs = dict(input_files(cfg), spectrum=c.spectrum_file if c.spectrum == "file" else None)
    meta = provenance(cfg, inputs, "calibrate")
    meta.update(model.meta(c.false_alarm), spectrum="none (supplied maps)" if ctx.maps else c.spectrum,
                sim_nside=ctx.nside, noise_uk_arcmin=c.noise_uk_arcmin, seed=c.seed, setup=ctx.key,
                spectrum_coupling=c.coupling if c.spectrum == "data" and not ctx.maps else "",
                **sims_provenance(ctx))
    write_table(model.thresholds_table(c.false_alarm), run.dir / THRESHOLDS, meta)
    write_table(model.null_table(), run.dir / NULL_PEAKS, meta)
    kind = "supplied simulation maps" if ctx.maps else "simulations"
    lines = [f"{model.n_sims} {kind} in {dt:.1f} s ({dt / max(1, model.n_sims):.2f} s each)"] + noise_lines
    lines += resolution_lines(model.n_sims, tuple(c.false_alarm) + (c.significance,))
    usable = [a for a in c.false_alarm if model.resolvable(a)]
    if usable:
        a = min(usable)
        lo, hi = 0, len(model.radii) - 1
        lines.append(f"{a:g} local thresholds (flip false / true): {model.threshold(lo, 0, a):.3f} / "
                     f"{model.threshold(lo, 1, a):.3f} at {model.radii[lo]:g} deg, {model.threshold(hi, 0, a):.3f} / "
                     f"{model.threshold(hi, 1, a):.3f} at {model.radii[hi]:g} deg")
    lines.append(f"extreme-value fit ({c.tail}) of the largest standardised peaks, descriptive only: "
                 f"KS p = {model.global_fit.ks_p:.3f}")
    level_ok = model.resolvable(c.significance)
    for name, col in (("peaks.ecsv", "s"), ("candidates.ecsv", "s_grid")):
        p = run.dir / name
        if not p.exists():
            continue
        t = read_table(p, name)
        if name == "peaks.ecsv":
            check_grid(t, model, p)
        if col not in t.colnames:
            continue
        out = annotate(t, model, col, level=c.significance)
        m = dict(t.meta)
        m.update({f"calibration_{k}": v for k, v in provenance(cfg, None, "calibrate").items()},
                 **{f"calibration_{k}": v for k, v in sims_provenance(ctx).items()},
                 calibration_n_sims=model.n_sims, p_floor=model.p_floor, significance_level=c.significance,
                 significance_resolved=level_ok,
                 ranking="p_global, then z, then grid S" if name == "candidates.ecsv" else "radius, sense")
        if name == "peaks.ecsv":
            out.sort(["radius_deg", "flip"])
        write_table(out, p, m)
        best = best_global(out)
        if best is not None:
            lines.append(f"{name}: first in rank at radius {best['radius_deg']:.2f} deg flip {bool(best['flip'])}: "
                         f"S_grid = {best[col]:.3f}, {_p_text(best, model.n_sims)}")
        if name == "candidates.ecsv":
            nsig = int(np.sum(out["significant"]))
            if not level_ok:
                lines.append(f"nothing can be called significant at {c.significance:g} with {model.n_sims} "
                             f"simulations (needs at least {sig.sims_needed(c.significance)})")
            else:
                lines.append(f"{nsig} candidate(s) significant at p_global <= {c.significance:g} "
                             f"({model.n_sims} simulations)")
    return lines


def _p_text(row, n_sims):
    """``p_local = ..., p_global = ...`` with ``<=`` where the value lies beyond every simulation."""
    floor = 1.0 / (n_sims + 1)
    pg = float(row["p_global"])
    note = f", the floor 1/{n_sims + 1}: beyond every simulation" if pg <= floor * (1 + 1e-9) else ""
    return f"p_local = {float(row['p_local']):.3g}, p_global = {pg:.3g} (N = {n_sims}{note})"


def cmd_calibrate(args):
    from .rundir import open_run
    from .inputs import load_run_config

    cfg = load_run_config(args)
    if cfg.calibrate.spectrum == "file":
        file_spectrum(cfg.calibrate.spectrum_file, int(cfg.prepare.lmax))
    if cfg.map.paths:                           # several maps: each in maps/<name>/ (stages.for_each_map)
        from .stages import calibrate_maps

        return calibrate_maps(cfg, args)
    shard = None
    if getattr(args, "shard", None):
        from .execute import parse_shard

        shard = parse_shard(args.shard)
    sky, prepared = load_data(cfg)              # bad inputs fail before the output dir is touched
    run = open_run(cfg, args.out, args.force, "calibrate")
    if shard is not None:
        run.finish(calibrate_shard(cfg, run, sky, prepared, shard))
    else:
        run.finish(calibrate_run(cfg, run, sky, prepared))
    return 0
