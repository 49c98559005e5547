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
   ``gauss_beam(fwhm_deg) / gauss_beam(input_fwhm_deg)``, where ``input_fwhm_deg``
   is the Gaussian beam the map already has (0, the default, takes the input as
   unsmoothed; it must not exceed ``fwhm_deg``, so nothing is sharpened).
5. High-pass: ``a_lm = 0`` for ``l < lmin``.
6. No pixel window is applied or removed, either for the input or for the output
   Nside: the search evaluates rings from the ``alm`` at exact positions, so the
   output map is only a picture of those ``alm`` (``healpy.alm2map``, no pixwin).
7. Mask at the output Nside: ``healpy.ud_grade`` of the 0/1 input mask, then a
   pixel is valid only if at least 99 % of its sub-pixels were (threshold 0.99;
   for an upgrade the mask is simply repeated).

The mask is *not* widened by the beam: the smoothing spreads the zeroed masked
region into valid pixels within about one ``fwhm_deg`` of the mask edge.  If that
matters, widen the mask before the run (or choose a smaller ``fwhm_deg``).

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
from .filters import filter_window  # noqa: F401  (calibrate divides it out of the data spectrum)

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


def beam_and_highpass(lmax, fwhm_deg, lmin=0, input_fwhm_deg=0.0):
    """Window ``b_l`` (l = 0..lmax): from a Gaussian beam of ``input_fwhm_deg`` to one of ``fwhm_deg``,
    times a cut below ``lmin``."""
    bl = hp.gauss_beam(math.radians(fwhm_deg), lmax=lmax) if fwhm_deg > 0 else np.ones(lmax + 1)
    bl = np.array(bl, dtype=np.float64)
    if input_fwhm_deg > 0:
        bl /= hp.gauss_beam(math.radians(input_fwhm_deg), lmax=lmax)
    bl[: max(0, min(lmin, lmax + 1))] = 0.0
    return bl


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


def apply_filter(alm, prep: PrepareSection) -> list:
    """Multiply ``alm`` in place by the multipole filter ``prep.filter`` (twinring.filters); its notes."""
    from .filters import filter_hash, filter_window

    f = filter_window(prep)
    if f is None:
        return []
    hp.almxfl(alm, f, inplace=True)
    return [f"multipole filter {prep.filter} applied (sha256 {filter_hash(f)})"]


def prepare_map(sky: SkyMap, prep: PrepareSection, nthreads: int = 1) -> Prepared:
    """Monopole/dipole removal, band limit and beam, output at ``prep.nside`` (see module notes).

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

    alm, weighted = map_to_alm(cleaned, lmax, prep.iterations)
    del cleaned
    notes.append(f"map2alm at lmax {lmax} from Nside {nside_in}, {prep.iterations} iteration(s)"
                 + (", ring weights" if weighted else ", no ring weights"))
    bl = beam_and_highpass(lmax, prep.fwhm_deg, prep.lmin, prep.input_fwhm_deg)
    hp.almxfl(alm, bl, inplace=True)
    notes.append(f"Gaussian beam fwhm {prep.fwhm_deg} deg in total (input beam {prep.input_fwhm_deg} deg); "
                 f"l < {prep.lmin} removed")
    notes += apply_filter(alm, prep)

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
    sky = load_map(m.path, field=m.field, mask_path=m.mask, mask_field=m.mask_field,
                   mask_threshold=m.mask_threshold)
    if nthreads is None:
        nthreads = getattr(cfg.compute, "threads", 0) or 1
    return prepare_map(sky, cfg.prepare, nthreads=nthreads)
