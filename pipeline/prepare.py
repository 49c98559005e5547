"""Prepare a sky map for the circle search: monopole/dipole removal, band limit, beam, resolution.

Steps of :func:`prepare_map` (input: a :class:`twinring.skymap.SkyMap` in uK, RING):

1. If ``prepare.remove_dipole``: fit monopole + dipole by least squares on the
   unmasked pixels and subtract it there (:func:`remove_monopole_dipole`).
2. Masked pixels are set to 0, so the masked sky contributes nothing to the
   harmonic transform (the search ignores masked samples anyway).
3. ``healpy.map2alm`` at ``lmax`` on the input resolution, with ``iterations``
   Jacobi iterations and healpy's bundled ring weights when they exist for the
   input Nside.  (Pixel weights would need a download; they are not used.)
4. Bring the map to a Gaussian beam of ``fwhm_deg`` in total: multiply by
   ``gauss_beam(fwhm_deg) / B_in(l)``, where ``B_in`` is the beam the map already
   has: a Gaussian of ``input_fwhm_deg`` (0, the default, takes the input as
   unsmoothed; it must not exceed ``fwhm_deg``, so nothing is sharpened) or a
   beam transfer function read from ``input_beam`` (a B_l table, FITS or text,
   :func:`read_beam`; the window may not exceed 1.1 anywhere, so nothing is
   sharpened much).
   With ``input_pixwin`` the input's HEALPix pixel window (:func:`pixel_window` at
   the input Nside) is divided out too: ``B_in(l) * p_l(Nside_in)``.
5. High-pass: ``a_lm = 0`` for ``l < lmin``.
6. No pixel window is applied for the output Nside: the search evaluates rings
   from the ``alm`` at exact positions, so the output map is only a picture of
   those ``alm`` (``healpy.alm2map``, no pixwin).
7. Mask at the output Nside: ``healpy.ud_grade`` of the 0/1 input mask, then a
   pixel is valid only if at least 99 % of its sub-pixels were (threshold 0.99;
   for an upgrade the mask is simply repeated).
8. With ``mask_widen_fwhm`` = k > 0 every valid pixel whose centre lies within
   k * ``fwhm_deg`` of a masked pixel's centre is masked too
   (:func:`widen_mask`): the smoothing spreads the zeroed masked region into
   valid pixels within about one ``fwhm_deg`` of the mask edge.  With k = 0 (the
   default) the mask is not widened and a note says so.

Memory: for an Nside 2048 input (50 M pixels) the input map and mask, one cleaned
copy and healpy's working arrays for ``map2alm`` are held at once (about 4 x 0.4 GB).
"""
from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import healpy as hp

from .config import InputError, PrepareSection
from .skymap import SkyMap, load_map, write_map  # noqa: F401

log = logging.getLogger("twinring.prepare")

MASK_KEEP = 0.99        # fraction of valid sub-pixels needed for a valid output pixel
_CHUNK = 1 << 21        # pixels per block for passes over big maps
PREPARED_MAP = "prepared.fits"
PREPARED_ALM = "prepared_alm.fits"


@dataclass(frozen=True, eq=False)
class Prepared:
    """The prepared sky: band-limited harmonic coefficients plus map and mask at ``nside``."""

    alm: np.ndarray             # complex128, healpy order, lmax = mmax = self.lmax
    lmax: int
    nside: int
    map: np.ndarray             # float64 uK, RING, alm2map(alm) at nside (no pixel window)
    mask: np.ndarray            # float64 0/1, RING, at nside (1 = use)
    fwhm_deg: float
    lmin: int = 2
    dipole: tuple | None = None  # (monopole, dx, dy, dz) in uK removed, or None
    frame: str | None = None
    notes: list = field(default_factory=list)


# --------------------------------------------------------------------------- pure functions
def _pixel_vectors(nside, nest=False):
    """A function ``(start, stop) -> (x, y, z)`` of pixel-centre unit vectors (ducc0.healpix)."""
    import ducc0

    base = ducc0.healpix.Healpix_Base(int(nside), "NEST" if nest else "RING")

    def vecs(pix, nthreads=1):
        v = base.pix2vec(np.asarray(pix, dtype=np.int64), nthreads=max(1, int(nthreads)))
        return v[:, 0], v[:, 1], v[:, 2]

    return vecs


def fit_monopole_dipole(values, mask, nest=False, nthreads=1):
    """Least-squares monopole + dipole on pixels with ``mask > 0``: returns (mono, dx, dy, dz).

    The model is ``T(n) = mono + d . n`` with ``n`` the pixel-centre unit vector.
    The normal equations are accumulated in blocks of pixels, so memory stays
    small at any Nside.
    """
    values = np.asarray(values)
    mask = np.asarray(mask)
    npix = values.size
    vecs = _pixel_vectors(hp.npix2nside(npix), nest)
    ata = np.zeros((4, 4))
    atb = np.zeros(4)
    for s in range(0, npix, _CHUNK):
        sel = np.flatnonzero(mask[s:s + _CHUNK] > 0) + s
        if sel.size == 0:
            continue
        x, y, z = vecs(sel, nthreads)
        t = values[sel]
        basis = np.stack([np.ones_like(x), x, y, z])
        ata += basis @ basis.T
        atb += basis @ t
    if ata[0, 0] < 4:
        raise ValueError("fewer than 4 unmasked pixels: monopole and dipole are undetermined")
    # lstsq on the 4x4 system: robust when the unmasked sky is too small to fix the dipole
    coeffs, *_ = np.linalg.lstsq(ata, atb, rcond=None)
    return tuple(float(c) for c in coeffs)


def remove_monopole_dipole(values, mask, nest=False, nthreads=1):
    """Subtract the monopole and dipole fitted on the unmasked pixels.

    Returns ``(cleaned, (mono, dx, dy, dz))``; ``cleaned`` is a new array, 0 where
    ``mask == 0``.
    """
    values = np.asarray(values, dtype=np.float64)
    mask = np.asarray(mask)
    coeffs = fit_monopole_dipole(values, mask, nest=nest, nthreads=nthreads)
    mono, dx, dy, dz = coeffs
    vecs = _pixel_vectors(hp.npix2nside(values.size), nest)
    cleaned = np.empty_like(values)
    for s in range(0, values.size, _CHUNK):
        e = min(s + _CHUNK, values.size)
        x, y, z = vecs(np.arange(s, e), nthreads)
        blk = values[s:e] - (mono + dx * x + dy * y + dz * z)
        blk *= mask[s:e] > 0
        cleaned[s:e] = blk
    return cleaned, coeffs


def beam_and_highpass(lmax, fwhm_deg, lmin=0, input_bl=None):
    """Window ``b_l`` (l = 0..lmax): from the input's beam to a Gaussian of ``fwhm_deg``, times a cut below ``lmin``.

    The input's window is ``input_bl`` (B_l for l = 0..lmax, pixel window included
    if wanted; :func:`input_window`), none when None.
    """
    bl = hp.gauss_beam(math.radians(fwhm_deg), lmax=lmax) if fwhm_deg > 0 else np.ones(lmax + 1)
    bl = np.array(bl, dtype=np.float64)
    if input_bl is not None:
        bl /= np.asarray(input_bl, float)[: lmax + 1]
    bl[: max(0, min(lmin, lmax + 1))] = 0.0
    return bl


MAX_SHARPEN = 1.1       # largest allowed target / input window (the prepared beam may not sharpen the input)


def text_columns(path, what, least, most, allowed) -> np.ndarray:
    """A numeric text table (numpy.loadtxt, 2-d) with ``least`` to ``most`` columns (``most`` None: any
    more are ignored by the caller); a one-line InputError naming the file and the key ``what``
    otherwise."""
    try:
        arr = np.loadtxt(path, ndmin=2)
    except Exception as exc:
        raise InputError(f"{path}: {what} is not a numeric text table ({exc.__class__.__name__}); allowed: {allowed}")
    if arr.shape[1] < least or (most is not None and arr.shape[1] > most):
        raise InputError(f"{path}: {what} has {arr.shape[1]} column(s); allowed: {allowed}")
    return arr


def read_beam(path, lmax) -> np.ndarray:
    """A beam transfer function B_l (l = 0..lmax) from a FITS table or a text file.

    FITS: the first binary table; a column named ``l``/``ell`` gives the
    multipoles, the B_l column is the first of ``B_l``, ``BL``, ``B``, ``BEAM``,
    ``INT_BEAM``, ``TEMPERATURE``, ``T``, ``TT`` (else the first other column);
    an image HDU with one row of B_l works too.  Text (numpy.loadtxt): one column
    (B_l for l = 0, 1, ...) or two (l, B_l).  B_l must be finite and > 0 for
    l <= lmax and normalised (B_0 within 5 % of 1; it is rescaled to exactly 1).
    """
    p = Path(path)
    what = "prepare.input_beam"
    if not p.exists() or p.is_dir():
        raise InputError(f"{p}: {what} file not found; allowed: a B_l table (FITS or text)")
    ell = None
    try:
        with open(p, "rb") as fh:
            head = fh.read(9)
    except OSError as exc:
        raise InputError(f"{p}: {what} cannot be read ({exc.strerror or exc}); allowed: a readable B_l table")
    if head.startswith(b"SIMPLE  ="):
        from astropy.io import fits

        try:
            with fits.open(p, memmap=False) as hdul:
                tab = next((h for h in hdul[1:] if isinstance(h, (fits.BinTableHDU, fits.TableHDU))), None)
                if tab is not None:
                    names = list(tab.columns.names)
                    up = {n.upper(): n for n in names}
                    lk = next((up[k] for k in ("L", "ELL", "MULTIPOLE") if k in up), None)
                    bk = next((up[k] for k in ("B_L", "BL", "B", "BEAM", "INT_BEAM", "TEMPERATURE", "T", "TT",
                                               "BEAM_WF", "WINDOW") if k in up), None)
                    if bk is None:
                        rest = [n for n in names if n != lk]
                        bk = rest[0] if rest else None
                    if bk is None:
                        raise ValueError("no B_l column")
                    bl = np.asarray(tab.data[bk], float).reshape(-1)
                    if lk is not None:
                        ell = np.asarray(tab.data[lk], float).reshape(-1)
                else:
                    img = next((h for h in hdul if h.data is not None), None)
                    if img is None:
                        raise ValueError("no data")
                    bl = np.asarray(img.data, float).reshape(-1)
        except InputError:
            raise
        except Exception as exc:
            raise InputError(f"{p}: {what} is not a readable B_l FITS table ({exc.__class__.__name__}: "
                             f"{' '.join(str(exc).split())}); allowed: a FITS table with a B_l column")
    else:
        arr = text_columns(p, what, 1, 2, "one column B_l (l = 0, 1, ...) or two columns l, B_l")
        if arr.shape[1] == 1:
            bl = arr[:, 0]
        else:
            ell, bl = arr[:, 0], arr[:, 1]
    if ell is not None:
        full = np.full(int(max(lmax, np.max(ell))) + 1, np.nan)
        li = np.round(ell).astype(int)
        ok = li >= 0
        full[li[ok]] = bl[ok]
        bl = full
    if bl.size < lmax + 1 or not np.all(np.isfinite(bl[: lmax + 1])):
        have = int(np.argmin(np.isfinite(np.append(bl, np.nan)))) - 1
        raise InputError(f"{p}: {what} gives B_l up to l = {max(have, -1)} only; allowed: every l from 0 to "
                         f"prepare.lmax = {lmax}")
    bl = np.array(bl[: lmax + 1], float)
    if np.any(bl <= 0):
        l0 = int(np.flatnonzero(bl <= 0)[0])
        raise InputError(f"{p}: {what} has B_l = {bl[l0]:.3g} at l = {l0}; allowed: B_l > 0 up to prepare.lmax")
    if abs(bl[0] - 1.0) > 0.05:
        raise InputError(f"{p}: {what} has B_0 = {bl[0]:.4g}; allowed: a transfer function normalised to B_0 = 1")
    return bl / bl[0]


_BEAMS: dict = {}


def read_beam_cached(path, lmax) -> np.ndarray:
    """:func:`read_beam`, kept per (file, size, modification time, lmax): every simulation reuses one read."""
    st = Path(path).stat() if Path(path).exists() else None
    key = (str(path), int(lmax), None if st is None else (st.st_size, st.st_mtime_ns))
    if key not in _BEAMS:
        if len(_BEAMS) > 8:
            _BEAMS.clear()
        _BEAMS[key] = read_beam(path, lmax)
    return _BEAMS[key].copy()


_PIXWIN: dict = {}


def pixel_window(nside, lmax, sub=8, n_pix=192) -> np.ndarray:
    """HEALPix temperature pixel window p_l (l = 0..lmax) of ``nside``.

    ``healpy.pixwin`` when its data file is at hand; else computed from the
    definition p_l^2 = < (1/Omega^2) int int_pixel P_l(n . n') dn dn' > over pixels
    (Gorski et al. 2005, ApJ 622, 759, sec. 4.2), each pixel sampled by its
    ``sub**2`` nested sub-pixel centres and ``n_pix`` pixels spread over all rings.
    """
    key = (int(nside), int(lmax))
    if key in _PIXWIN:
        return _PIXWIN[key].copy()
    try:
        import warnings as _w

        with _w.catch_warnings():
            _w.simplefilter("ignore")
            pw = np.asarray(hp.pixwin(int(nside), lmax=int(lmax)), float)[: lmax + 1]
    except Exception:       # healpy fetches the file from the network when it is not installed
        npix = hp.nside2npix(int(nside))
        ring = np.unique(np.linspace(0, npix - 1, min(n_pix, npix)).astype(np.int64))
        nest = hp.ring2nest(int(nside), ring)
        k2 = sub * sub
        kids = (nest[:, None] * k2 + np.arange(k2)[None, :]).ravel()
        v = np.stack(hp.pix2vec(int(nside) * sub, kids, nest=True), -1).reshape(ring.size, k2, 3)
        x = np.clip(np.einsum("pia,pja->pij", v, v), -1.0, 1.0)
        w2 = np.empty(lmax + 1)
        p0, p1 = np.ones_like(x), x
        w2[0] = 1.0
        if lmax >= 1:
            w2[1] = p1.mean()
        for l in range(1, lmax):
            p0, p1 = p1, ((2 * l + 1) * x * p1 - l * p0) / (l + 1)
            w2[l + 1] = p1.mean()
        pw = np.sqrt(np.maximum(w2, 0.0))
    _PIXWIN[key] = pw
    return pw.copy()


def input_beam_window(prep, lmax, input_bl=None) -> np.ndarray:
    """The input map's beam B_l (l = 0..lmax), without the pixel window: ``input_bl`` when given,
    else from ``prep.input_beam`` or ``prep.input_fwhm_deg``, else 1."""
    if input_bl is None and prep.input_beam:
        input_bl = read_beam_cached(prep.input_beam, lmax)
    if input_bl is not None:
        return np.array(input_bl, float)[: lmax + 1]
    if prep.input_fwhm_deg > 0:
        return np.array(hp.gauss_beam(math.radians(prep.input_fwhm_deg), lmax=lmax), float)
    return np.ones(int(lmax) + 1)


def input_window(prep: PrepareSection, lmax, nside_in, input_bl=None) -> np.ndarray:
    """The window the input map already carries (l = 0..lmax): its beam times, if asked, its pixel window."""
    w = input_beam_window(prep, lmax, input_bl)
    if prep.input_pixwin:
        w = w * pixel_window(int(nside_in), lmax)
    return w


def check_sharpening(src, prep: PrepareSection, win_in):
    """Refuse a target beam that would amplify the input (target / input window above MAX_SHARPEN)."""
    lmax = win_in.size - 1
    tgt = hp.gauss_beam(math.radians(prep.fwhm_deg), lmax=lmax) if prep.fwhm_deg > 0 else np.ones(lmax + 1)
    sl = slice(max(prep.lmin, 0), lmax + 1)
    ratio = tgt[sl] / win_in[sl]
    if ratio.size and np.max(ratio) > MAX_SHARPEN:
        l0 = int(np.argmax(ratio)) + sl.start
        what = "prepare.input_beam" if prep.input_beam else "prepare.input_pixwin"
        raise InputError(f"{src}: {what}: the prepared beam of fwhm {prep.fwhm_deg} deg would amplify the input by "
                         f"{float(np.max(ratio)):.3g} at l = {l0}; allowed: prepare.fwhm_deg wider than the input's "
                         f"beam and pixel (target / input window <= {MAX_SHARPEN})")


def widen_mask(mask, radius_deg):
    """0/1 mask with every valid pixel within ``radius_deg`` (centre to centre) of a masked pixel masked too."""
    mask = (np.asarray(mask) > 0.5)
    if radius_deg <= 0 or mask.all() or not mask.any():
        return mask.astype(np.float64)
    nside = hp.npix2nside(mask.size)
    masked = np.flatnonzero(~mask)
    nb = hp.get_all_neighbours(nside, masked)            # (8, n), -1 where a neighbour does not exist
    nbv = np.where(nb >= 0, mask[np.maximum(nb, 0)], False)
    edge = masked[np.any(nbv, axis=0)]                     # masked pixels touching valid ones
    out = mask.copy()
    vec = np.stack(hp.pix2vec(nside, edge), axis=-1)
    r = math.radians(radius_deg)
    for v in vec:
        out[hp.query_disc(nside, v, r, inclusive=False)] = False
    return out.astype(np.float64)


def regrid_mask(mask, nside_out, keep=MASK_KEEP):
    """0/1 mask at ``nside_out``: a pixel is valid when at least ``keep`` of its sub-pixels are."""
    mask = np.asarray(mask)
    nside_in = hp.npix2nside(mask.size)
    if nside_out == nside_in:
        return (mask > 0).astype(np.float64)
    frac = hp.ud_grade(mask.astype(np.float64, copy=False), nside_out, order_in="RING", order_out="RING")
    return (frac >= keep - 1e-12).astype(np.float64)


def _ring_weights_available(nside):
    import os

    d = os.path.join(os.path.dirname(hp.__file__), "data")
    return os.path.exists(os.path.join(d, f"weight_ring_n{nside:05d}.fits"))


def map_to_alm(values, lmax, iterations=3):
    """``healpy.map2alm`` (spin 0) with ring weights when healpy ships them for this Nside."""
    nside = hp.npix2nside(values.size)
    use_w = _ring_weights_available(nside)
    alm = hp.map2alm(values, lmax=lmax, mmax=lmax, iter=iterations, pol=False, use_weights=use_w)
    return np.asarray(alm, dtype=np.complex128), use_w


MIN_RELATIVE_RMS = 1e-6    # prepared rms / input rms below this: nothing left to search (a constant map)


def _input_scale(src, sky: SkyMap) -> float:
    """The input's rms about zero on its unmasked pixels (uK); InputError when the map is (near) constant there."""
    seen = np.asarray(sky.values, float)[np.asarray(sky.mask) > 0]
    scale = float(np.sqrt(np.mean(seen ** 2))) if seen.size else 0.0
    spread = float(np.std(seen)) if seen.size else 0.0
    if not (spread > MIN_RELATIVE_RMS * scale and spread > 0.0):
        raise InputError(f"{src}: the map is (near) constant on its usable pixels: rms {spread:.3g} uK about "
                         f"its mean {float(np.mean(seen)) if seen.size else 0.0:.4g} uK; allowed: a map that "
                         f"varies on the sky (rms above {MIN_RELATIVE_RMS:g} of its rms about zero)")
    return scale


def check_variance(src, scale, out_map, mask_out, prep: PrepareSection):
    """Refuse a map with (near) zero variance on its usable pixels, before or after preparation (one line).

    A map constant on its unmasked pixels is refused as it is, before any
    work (:func:`_input_scale`; masking it would only make the mask's edge
    into structure).  A map with nothing at ``prepare.lmin..lmax`` (e.g. a
    pure monopole and dipole) has only rounding noise left after preparation
    (about 1e-16 of the input, or 1e-8 from pixelisation with nothing
    removed), which the S statistic would happily "match" (s near 1).  The
    floor is :data:`MIN_RELATIVE_RMS` of the input's rms about zero
    (``scale``, uK) on its unmasked pixels.
    """
    use = np.asarray(mask_out) > 0.5
    vals = np.asarray(out_map, float)[use]
    rms = float(np.std(vals)) if vals.size else 0.0
    if not (np.isfinite(rms) and rms > MIN_RELATIVE_RMS * scale and rms > 0.0):
        steps = ("monopole/dipole removal, " if prep.remove_dipole else "") + f"l {prep.lmin}..{prep.lmax}"
        raise InputError(f"{src}: the prepared map is (near) constant: rms {rms:.3g} uK on the usable sky after "
                         f"{steps} (input rms {scale:.3g} uK); allowed: a map that varies on the sky at "
                         f"prepare.lmin..lmax (prepared rms above {MIN_RELATIVE_RMS:g} of the input's)")


def apply_filter(alm, prep: PrepareSection, filt=None) -> list:
    """Multiply ``alm`` in place by the multipole filter ``prep.filter`` (twinring.filters); its notes.

    ``filt``: that filter already computed (simulations and injections ship it to their workers,
    so CAMB's source split is not redone in every process); None: computed here.
    """
    from .filters import filter_hash, filter_window

    if prep.filter == "optimal":
        return ["filter optimal: ring modes weighted per radius by the search (twinring.filters), a_lm unchanged"]
    f = filter_window(prep) if filt is None else filt
    if f is None:
        return []
    hp.almxfl(alm, f, inplace=True)
    return [f"multipole filter {prep.filter} applied (sha256 {filter_hash(f)})"]


def prepare_map(sky: SkyMap, prep: PrepareSection, nthreads: int = 1, input_bl=None, filt=None) -> Prepared:
    """Monopole/dipole removal, band limit and beam, output at ``prep.nside`` (see module notes).

    ``input_bl``: the input beam B_l (l = 0..lmax) already read from ``prep.input_beam``
    (read here when None and the key is set).  ``filt``: the multipole filter of ``prep.filter``
    already computed (:func:`apply_filter`).

    ``nthreads`` is used for the pixel geometry (ducc0); healpy's transforms
    use OpenMP and follow ``OMP_NUM_THREADS``.
    """
    nside_in = sky.nside
    lmax = int(prep.lmax)
    src = sky.path or "map"
    if lmax > 3 * nside_in - 1:
        raise InputError(f"{src}: map Nside {nside_in} supports lmax up to {3 * nside_in - 1}, found "
                         f"prepare.lmax = {lmax}; allowed: prepare.lmax <= 3*Nside_map-1 or a finer map")
    if not np.any(sky.mask > 0):
        raise InputError(f"{src}: no unmasked pixel; allowed: a map with some valid pixels")
    scale = _input_scale(src, sky)
    notes = []

    # mask at the output resolution first (its temporaries are freed before map2alm)
    mask_out = regrid_mask(sky.mask, prep.nside)
    if nside_in != prep.nside:
        notes.append(f"mask regridded from Nside {nside_in} to {prep.nside} "
                     f"(valid where >= {MASK_KEEP:.0%} of sub-pixels are valid)")
    if not mask_out.any():
        raise InputError(f"{src}: no pixel stays valid at prepare.nside = {prep.nside} "
                         f"(needs >= {MASK_KEEP:.0%} valid sub-pixels); allowed: a larger unmasked region "
                         "or a finer prepare.nside")

    dipole = None
    if prep.remove_dipole:
        cleaned, dipole = remove_monopole_dipole(sky.values, sky.mask, nthreads=nthreads)
        notes.append("monopole {:.4g} uK and dipole ({:.4g}, {:.4g}, {:.4g}) uK removed on the unmasked sky"
                     .format(*dipole))
    else:
        cleaned = sky.values * (sky.mask > 0)

    if prep.mask_widen_fwhm > 0 and np.any(mask_out <= 0.5):
        before = float(np.mean(mask_out > 0.5))
        mask_out = widen_mask(mask_out, prep.mask_widen_fwhm * prep.fwhm_deg)
        after = float(np.mean(mask_out > 0.5))
        if not mask_out.any():
            raise InputError(f"{src}: prepare.mask_widen_fwhm: found {prep.mask_widen_fwhm}; widening the mask by "
                             f"{prep.mask_widen_fwhm * prep.fwhm_deg:g} deg leaves no valid pixel; allowed: a "
                             "smaller value (or a smaller prepare.fwhm_deg)")
        notes.append(f"mask widened by {prep.mask_widen_fwhm:g} x fwhm = {prep.mask_widen_fwhm * prep.fwhm_deg:g} deg "
                     f"at Nside {prep.nside}: usable sky {100 * before:.1f}% -> {100 * after:.1f}%")
    elif np.any(mask_out <= 0.5):
        notes.append(f"mask not widened (prepare.mask_widen_fwhm 0): the {prep.fwhm_deg:g} deg smoothing mixes the "
                     "zeroed masked sky into valid pixels near the mask edge")

    win_in = input_window(prep, lmax, nside_in, input_bl)
    check_sharpening(src, prep, win_in)

    alm, weighted = map_to_alm(cleaned, lmax, prep.iterations)
    del cleaned
    notes.append(f"map2alm at lmax {lmax} from Nside {nside_in}, {prep.iterations} iteration(s)"
                 + (", ring weights" if weighted else ", no ring weights"))
    bl = beam_and_highpass(lmax, prep.fwhm_deg, prep.lmin, input_bl=win_in)
    hp.almxfl(alm, bl, inplace=True)
    if prep.input_beam:
        beam_in = f"input beam B_l from {Path(prep.input_beam).name}"
    else:
        beam_in = f"input beam {prep.input_fwhm_deg} deg"
    pix_in = (f", input pixel window of Nside {nside_in} divided out" if prep.input_pixwin
              else ", input pixel window not removed (prepare.input_pixwin false)")
    notes.append(f"Gaussian beam fwhm {prep.fwhm_deg} deg in total ({beam_in}{pix_in}); l < {prep.lmin} removed")
    notes += apply_filter(alm, prep, filt)

    out_map = hp.alm2map(alm, prep.nside, lmax=lmax, mmax=lmax, pixwin=False)
    check_variance(src, scale, out_map, mask_out, prep)
    for n in notes:
        log.info(n)
    return Prepared(alm=alm, lmax=lmax, nside=int(prep.nside), map=np.asarray(out_map, dtype=np.float64),
                    mask=mask_out, fwhm_deg=float(prep.fwhm_deg), lmin=int(prep.lmin), dipole=dipole,
                    frame=sky.frame, notes=list(sky.notes) + notes)


# --------------------------------------------------------------------------- edges
def write_prepared(prepared: Prepared, out_dir, provenance=None) -> Path:
    """Write ``prepared.fits`` (columns TEMPERATURE in uK and MASK, 1 = use, RING) and
    ``prepared_alm.fits`` (the band-limited a_lm, healpy.write_alm layout), atomically.

    Header cards LMAX, LMIN, FWHM_DEG, DIPREM and the dipole coefficients, plus
    ``provenance``.  Returns the path of ``prepared.fits``.
    """
    from .results import atomic_path

    out = Path(out_dir)
    extra = [("LMAX", prepared.lmax, "band limit of the prepared map"),
             ("LMIN", prepared.lmin, "multipoles below this removed"),
             ("FWHM_DEG", prepared.fwhm_deg, "Gaussian beam applied [deg]"),
             ("DIPREM", prepared.dipole is not None, "monopole and dipole removed")]
    if prepared.dipole is not None:
        for k, v in zip(("MONO_UK", "DIPX_UK", "DIPY_UK", "DIPZ_UK"), prepared.dipole):
            extra.append((k, v, "removed [uK]"))
    path = write_map(out / PREPARED_MAP, [prepared.map, prepared.mask], extra_header=extra,
                     provenance=provenance, column_names=["TEMPERATURE", "MASK"], coord=prepared.frame,
                     column_units=["uK", ""], dtype=np.float64)
    with atomic_path(out / PREPARED_ALM) as tmp:
        hp.write_alm(str(tmp), prepared.alm, lmax=prepared.lmax, mmax=prepared.lmax, overwrite=True)
    return path


def read_prepared(path) -> Prepared:
    """Read what :func:`write_prepared` wrote (``path``: prepared.fits or its directory)."""
    from astropy.io import fits

    p = Path(path)
    if p.is_dir():
        p = p / PREPARED_MAP
    from .skymap import _read_column

    values, _, info = _read_column(p, "prepared map", 0)
    mask, _, _ = _read_column(p, "prepared map", 1)
    alm_path = p.with_name(PREPARED_ALM)
    if not alm_path.exists():
        raise InputError(f"{alm_path}: prepared a_lm file not found; allowed: the output of the prepare stage")
    hdr = fits.getheader(p, 1)
    try:
        alm = np.asarray(hp.read_alm(str(alm_path)), dtype=np.complex128)
        lmax = int(hdr["LMAX"])
    except Exception as exc:
        raise InputError(f"{alm_path}: cannot read prepared a_lm ({exc.__class__.__name__}); "
                         "allowed: the output of the prepare stage")
    if alm.size != hp.Alm.getsize(lmax):
        raise InputError(f"{alm_path}: {alm.size} a_lm for LMAX = {lmax}; allowed: (lmax+1)(lmax+2)/2 coefficients")
    dip = None
    if hdr.get("DIPREM"):
        dip = tuple(float(hdr[k]) for k in ("MONO_UK", "DIPX_UK", "DIPY_UK", "DIPZ_UK"))
    return Prepared(alm=alm, lmax=lmax, nside=info["nside"], map=values, mask=(mask > 0).astype(np.float64),
                    fwhm_deg=float(hdr.get("FWHM_DEG", 0.0)), lmin=int(hdr.get("LMIN", 0)), dipole=dip,
                    frame=info["frame"], notes=list(info["notes"]))


def load_and_prepare(cfg, nthreads: int | None = None) -> Prepared:
    """Load ``cfg.map`` and prepare it with ``cfg.prepare``."""
    m = cfg.map
    if not m.path:
        raise InputError(f"{cfg.source or '<config>'}: map.path: found null; allowed: a HEALPix FITS file path")
    from .skymap import load_config_map

    sky = load_config_map(m)
    if nthreads is None:
        nthreads = getattr(cfg.compute, "threads", 0) or 1
    return prepare_map(sky, cfg.prepare, nthreads=nthreads)
