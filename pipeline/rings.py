"""Circles on the sky: centre and radius grids, phase frames, exact ring sampling.

Conventions (shared by the search and the topology predictions):

* A circle of angular radius ``alpha`` about the unit vector ``c`` is
  ``p(phi) = cos(alpha) c + sin(alpha) (cos(phi) e1 + sin(phi) e2)`` with
  ``e2 = c x e1``: every circle has the same handedness about its own centre.
* Phase origin ``e1``: for a back-to-back pair (centres antipodal to within
  ``BACK_TO_BACK_TOL``) it is the direction towards the north pole projected
  onto the plane normal to ``c`` (towards +x when the centre lies within
  ``POLE_CAP_DEG`` of a pole); for any other pair it is the direction towards
  the *other* circle's centre, projected likewise.
* Twist and sense: circle 1 at phase ``phi`` is matched with circle 2 at phase
  ``phi + twist`` (``flip = False``) or ``twist - phi`` (``flip = True``).
  A pure translation gives ``flip = True`` and twist 0.

Ring values come from the map's harmonic coefficients through ducc0's
general-position synthesis at the exact sample positions.
"""
from __future__ import annotations

import numpy as np
import healpy as hp
import scipy.fft

BACK_TO_BACK_TOL = 1e-8      # radians: |c1 + c2| below this counts as back-to-back
POLE_CAP_DEG = 5.0           # centres closer than this to a pole take +x as phase reference


def unit(v):
    v = np.asarray(v, dtype=float)
    return v / np.linalg.norm(v, axis=-1, keepdims=True)


def lonlat_to_vec(lon_deg, lat_deg):
    lon = np.radians(lon_deg)
    lat = np.radians(lat_deg)
    return np.stack([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)], axis=-1)


def vec_to_lonlat(v):
    v = unit(v)
    lon = np.degrees(np.arctan2(v[..., 1], v[..., 0])) % 360.0
    lat = np.degrees(np.arcsin(np.clip(v[..., 2], -1, 1)))
    return lon, lat


def separation_deg(a, b):
    """Angle between unit vectors (robust near 0 and 180 degrees)."""
    a, b = unit(a), unit(b)
    cross = np.linalg.norm(np.cross(a, b), axis=-1)
    dot = np.sum(a * b, axis=-1)
    return np.degrees(np.arctan2(cross, dot))


def is_back_to_back(c1, c2):
    return np.linalg.norm(unit(c1) + unit(c2), axis=-1) < BACK_TO_BACK_TOL


def _project(c, ref):
    return ref - np.sum(ref * c, axis=-1, keepdims=True) * c


def phase_frame(centre, other=None):
    """(e1, e2) for circles about ``centre`` (n, 3), paired with ``other`` (n, 3) or None.

    ``other=None`` (or an antipodal ``other``) selects the back-to-back rule.
    """
    c = unit(np.atleast_2d(centre))
    north = np.broadcast_to([0.0, 0.0, 1.0], c.shape)
    east = np.broadcast_to([1.0, 0.0, 0.0], c.shape)
    near_pole = np.abs(c[:, 2]) > np.cos(np.radians(POLE_CAP_DEG))
    ref = np.where(near_pole[:, None], east, north)
    if other is not None:
        o = unit(np.broadcast_to(np.atleast_2d(other), c.shape))
        b2b = np.linalg.norm(c + o, axis=-1) < BACK_TO_BACK_TOL
        ref = np.where(b2b[:, None], ref, o)
    e1 = unit(_project(c, ref))
    e2 = np.cross(c, e1)
    return e1, e2


def ring_points(centre, radius_rad, nsamp, other=None, phase0=0.0):
    """Unit vectors of ``nsamp`` equally spaced samples, shape (n, nsamp, 3)."""
    c = unit(np.atleast_2d(centre))
    e1, e2 = phase_frame(c, other)
    phi = phase0 + 2 * np.pi * np.arange(nsamp) / nsamp
    ca, sa = np.cos(radius_rad), np.sin(radius_rad)
    coords = np.stack([np.full(nsamp, ca), sa * np.cos(phi), sa * np.sin(phi)], axis=-1)   # (N, 3)
    basis = np.stack([c, e1, e2], axis=1)                                                  # (n, 3, 3)
    return np.matmul(coords[None, :, :], basis)


def phase_of(points, centre, other=None):
    """Phase (radians, [0, 2pi)) of ``points`` (n, 3) on circles about ``centre`` (n, 3)."""
    c = unit(np.atleast_2d(centre))
    e1, e2 = phase_frame(c, other)
    p = np.atleast_2d(points)
    return np.arctan2(np.sum(p * e2, -1), np.sum(p * e1, -1)) % (2 * np.pi)


def samples_for(radius_rad, lmax, margin=8):
    """Samples per ring: about 2 (lmax sin(alpha) + margin), rounded up to a fast even FFT length."""
    m_top = int(np.ceil(lmax * np.sin(radius_rad))) + margin
    n = scipy.fft.next_fast_len(max(2 * m_top, 16), real=True)
    while n % 2:
        n = scipy.fft.next_fast_len(n + 1, real=True)
    return n


def center_grid(nside_centers):
    """Unit vectors of the HEALPix (RING) pixel centres used as circle centres."""
    return np.stack(hp.pix2vec(nside_centers, np.arange(hp.nside2npix(nside_centers))), axis=-1)


def antipode_index(nside_centers):
    """Index of the antipodal centre for every centre (HEALPix grids are antipode-symmetric)."""
    v = center_grid(nside_centers)
    return hp.vec2pix(nside_centers, -v[:, 0], -v[:, 1], -v[:, 2])


def synthesize_at(alm, lmax, vecs, nthreads=1, epsilon=1e-7):
    """Evaluate a real map with harmonic coefficients ``alm`` (healpy order) at unit vectors."""
    v = np.asarray(vecs, dtype=float).reshape(-1, 3)
    loc = np.empty((v.shape[0], 2))
    np.arccos(np.clip(v[:, 2], -1.0, 1.0), out=loc[:, 0])
    np.arctan2(v[:, 1], v[:, 0], out=loc[:, 1])
    loc[:, 1] %= 2 * np.pi
    a = np.ascontiguousarray(np.asarray(alm, dtype=np.complex128).reshape(1, -1))
    out = np.empty((1, v.shape[0]), dtype=np.float64)
    if v.shape[0] == 0:
        return out[0].reshape(np.shape(vecs)[:-1])
    import ducc0

    ducc0.sht.synthesis_general(alm=a, spin=0, lmax=lmax, loc=loc, epsilon=epsilon, nthreads=nthreads, map=out)
    return out[0].reshape(np.shape(vecs)[:-1])


def mask_at(mask, vecs):
    """Mask weight (0 or 1) at unit vectors by nearest pixel of a HEALPix RING mask."""
    if mask is None:
        return None
    v = np.asarray(vecs, dtype=float).reshape(-1, 3)
    nside = hp.npix2nside(mask.size)
    pix = hp.vec2pix(nside, v[:, 0], v[:, 1], v[:, 2])
    return mask[pix].astype(np.float32).reshape(np.shape(vecs)[:-1])


def sample_rings(alm, lmax, centres, radius_rad, nsamp, other=None, mask=None, nthreads=1):
    """Ring values (n, nsamp) and mask weights (n, nsamp) or None."""
    pts = ring_points(centres, radius_rad, nsamp, other)
    vals = synthesize_at(alm, lmax, pts, nthreads=nthreads)
    return vals, mask_at(mask, pts)


def _origin_angle(centre, other):
    """Angle of the pair-convention phase origin, measured in the reference (back-to-back) frame."""
    e1r, e2r = phase_frame(centre, None)
    e1, _ = phase_frame(centre, other)
    return np.arctan2(np.sum(e1 * e2r, -1), np.sum(e1 * e1r, -1))


def wrap_twist_deg(twist_deg, decimals=None):
    """Twist in degrees brought into [0, 360).

    ``decimals``: the precision the value will be printed or stored with; a value
    that would round to 360 there (for example 359.97 printed with one decimal)
    becomes 0.  Floating-point reduction alone cannot promise this: ``x % 360.0``
    is exactly 360.0 for a tiny negative x, and 359.97 prints as "360.0".
    """
    t = np.mod(np.asarray(twist_deg, dtype=float), 360.0)
    if decimals is not None:
        t = np.round(t, decimals)
    t = np.where(t >= 360.0, 0.0, t) + 0.0          # + 0.0: no negative zero
    return float(t) if t.ndim == 0 else t


def format_twist(twist_deg, decimals=1) -> str:
    """A twist for printing, in [0, 360) at the printed precision: ``format_twist(359.97) == "0.0"``."""
    return f"{wrap_twist_deg(twist_deg, decimals):.{decimals}f}"


def twist_from_reference(beta_ref, c1, c2, flip):
    """Convert a twist measured on rings sampled in the reference frame (``other=None``)
    into the pair convention of :func:`phase_frame` (radians, [0, 2pi)).

    With phase origins at angles d1, d2 of the reference frames, phi_conv = phi_ref - d,
    so flip = False: twist = beta_ref + d1 - d2 and flip = True: twist = beta_ref - d1 - d2.
    """
    c1 = np.atleast_2d(c1)
    c2 = np.atleast_2d(c2)
    d1 = _origin_angle(c1, c2)
    d2 = _origin_angle(c2, c1)
    flip = np.asarray(flip, dtype=bool)
    tw = np.where(flip, beta_ref - d1 - d2, beta_ref + d1 - d2)
    return np.mod(tw, 2 * np.pi)
