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


def vec_to_loc(vecs):
    """Colatitude and longitude (radians; (..., 2), longitude in [0, 2pi)) of unit vectors (..., 3)."""
    v = np.asarray(vecs, dtype=float).reshape(-1, 3)
    loc = np.empty((v.shape[0], 2))
    np.arccos(np.clip(v[:, 2], -1.0, 1.0), out=loc[:, 0])
    np.arctan2(v[:, 1], v[:, 0], out=loc[:, 1])
    loc[:, 1] %= 2 * np.pi
    return loc.reshape(np.shape(vecs)[:-1] + (2,))


def synthesize_loc(alm, lmax, loc, nthreads=1, epsilon=1e-7):
    """Evaluate a real map with harmonic coefficients ``alm`` (healpy order) at (colatitude, longitude)
    pairs ``loc`` (..., 2) in radians."""
    shape = np.shape(loc)[:-1]
    loc = np.ascontiguousarray(np.asarray(loc, dtype=np.float64).reshape(-1, 2))
    a = np.ascontiguousarray(np.asarray(alm, dtype=np.complex128).reshape(1, -1))
    out = np.empty((1, loc.shape[0]), dtype=np.float64)
    if loc.shape[0] == 0:
        return out[0].reshape(shape)
    import ducc0

    ducc0.sht.synthesis_general(alm=a, spin=0, lmax=lmax, loc=loc, epsilon=epsilon, nthreads=nthreads, map=out)
    return out[0].reshape(shape)


def synthesize_at(alm, lmax, vecs, nthreads=1, epsilon=1e-7):
    """Evaluate a real map with harmonic coefficients ``alm`` (healpy order) at unit vectors."""
    return synthesize_loc(alm, lmax, vec_to_loc(vecs), nthreads=nthreads, epsilon=epsilon)


def mask_at(mask, vecs):
    """Mask weight (0 or 1) at unit vectors by nearest pixel of a HEALPix RING mask."""
    if mask is None:
        return None
    v = np.asarray(vecs, dtype=float).reshape(-1, 3)
    nside = hp.npix2nside(mask.size)
    pix = hp.vec2pix(nside, v[:, 0], v[:, 1], v[:, 2])
    return mask[pix].astype(np.float32).reshape(np.shape(vecs)[:-1])


def sample_rings(alm, lmax, centres, radius_rad, nsamp, other=None, mask=None, nthreads=1, cache=True):
    """Ring values (n, nsamp) and mask weights (n, nsamp) or None.

    Reference-frame rings (``other=None``) take their sample coordinates from :func:`ring_locations`
    (computed once per iso-latitude ring of centres and kept for later calls, ``cache=True``) and
    their mask weights from :func:`ring_mask_weights`; with ``cache=False`` or a pair frame every
    sample point is computed directly.
    """
    if other is None and cache:
        iso = iso_latitude_plan(centres, radius_rad, nsamp)
        if iso is not None and iso_wins(lmax, iso):
            vals = synthesize_iso(alm, lmax, iso, nthreads=nthreads)
        else:
            vals = synthesize_loc(alm, lmax, ring_locations(centres, radius_rad, nsamp), nthreads=nthreads)
        return vals, ring_mask_weights(mask, centres, radius_rad, nsamp)
    pts = ring_points(centres, radius_rad, nsamp, other)
    vals = synthesize_at(alm, lmax, pts, nthreads=nthreads)
    return vals, mask_at(mask, pts)


# --------------------------------------------------------------------------- geometry computed once
# Reference-frame circles about centres of equal z away from the pole caps are turned copies of one
# another about the z axis: the frame (c, e1 towards the north, e2) turns with the centre's longitude,
# so every sample keeps its colatitude and gains the centre's longitude difference.  The colatitudes and
# longitudes of one circle per iso-latitude ring are all that is computed (127 rings instead of 12,288
# centres at nside_centers 32) and are kept per process: they depend only on the centres, the radius and
# the samples per ring, the same for every chunk and every simulation.
GEOMETRY_CACHE_MB = 256.0        # bound on the kept per-ring geometry and mask weights (per process)
_GEOM_CACHE: dict = {}
_GEOM_BYTES = [0]


def _digest(*arrays):
    import hashlib

    h = hashlib.blake2b(digest_size=16)
    for a in arrays:
        a = np.ascontiguousarray(a)
        h.update(repr((a.dtype.str, a.shape)).encode())
        h.update(a.tobytes())
    return h.hexdigest()


def _cache_put(key, value, nbytes):
    if nbytes > GEOMETRY_CACHE_MB * 1e6:
        return value
    while _GEOM_CACHE and _GEOM_BYTES[0] + nbytes > GEOMETRY_CACHE_MB * 1e6:
        old = next(iter(_GEOM_CACHE))             # oldest first
        _GEOM_BYTES[0] -= _GEOM_CACHE.pop(old)[1]
    _GEOM_CACHE[key] = (value, nbytes)
    _GEOM_BYTES[0] += nbytes
    return value


def clear_geometry_cache():
    _GEOM_CACHE.clear()
    _GEOM_BYTES[0] = 0


def _centre_groups(centres):
    """Iso-latitude groups: (representative index per group, group of each centre, longitude of each
    centre minus its representative's); centres in the pole caps form groups of their own."""
    raw = np.atleast_2d(np.asarray(centres, dtype=float))
    c = unit(raw)
    n = c.shape[0]
    polar = np.abs(c[:, 2]) > np.cos(np.radians(POLE_CAP_DEG))
    # unit input keeps its own z (normalising again would split a HEALPix ring in the last bit)
    unit_input = np.allclose(np.linalg.norm(raw, axis=-1), 1.0, rtol=0, atol=1e-12)
    z = np.where(polar, np.nan, raw[:, 2] if unit_input else c[:, 2])
    order = np.argsort(z, kind="stable")
    zs = z[order]
    new = np.ones(n, dtype=bool)
    new[1:] = ~(zs[1:] == zs[:-1])               # nan never equals: every polar centre starts a group
    gid_sorted = np.cumsum(new) - 1
    group = np.empty(n, dtype=np.int64)
    group[order] = gid_sorted
    rep = order[new]
    lon = np.arctan2(c[:, 1], c[:, 0])
    dlon = lon - lon[rep][group]
    dlon[rep] = 0.0
    return rep, group, dlon


def ring_geometry(centres, radius_rad, nsamp):
    """Per iso-latitude group: colatitude and longitude (radians) of the samples of the representative's
    reference-frame circle, (g, nsamp) each, plus the group and longitude offset of every centre.

    Returns ``(theta, phi, group, dlon)``; kept per process (see ``GEOMETRY_CACHE_MB``)."""
    c = np.ascontiguousarray(np.atleast_2d(centres), dtype=float)
    key = ("geom", _digest(c), float(radius_rad), int(nsamp))
    hit = _GEOM_CACHE.get(key)
    if hit is not None:
        return hit[0]
    rep, group, dlon = _centre_groups(c)
    loc = vec_to_loc(ring_points(c[rep], radius_rad, nsamp))          # (g, nsamp, 2)
    theta, phi = np.ascontiguousarray(loc[..., 0]), np.ascontiguousarray(loc[..., 1])
    value = (theta, phi, group, dlon)
    return _cache_put(key, value, theta.nbytes + phi.nbytes + group.nbytes + dlon.nbytes)


def ring_locations(centres, radius_rad, nsamp):
    """(n, nsamp, 2) colatitude and longitude (radians, longitude in [0, 2pi)) of the reference-frame
    ring samples about ``centres``: the same points as :func:`ring_points` with ``other=None`` (to
    rounding), from the per-ring geometry of :func:`ring_geometry`."""
    theta, phi, group, dlon = ring_geometry(centres, radius_rad, nsamp)
    n = group.size
    loc = np.empty((n, int(nsamp), 2))
    np.take(theta, group, axis=0, out=loc[..., 0])
    lon = loc[..., 1]
    np.add(phi[group], dlon[:, None], out=lon)
    two_pi = 2 * np.pi
    lon[lon < 0] += two_pi
    lon[lon >= two_pi] -= two_pi
    return loc


def iso_latitude_plan(centres, radius_rad, nsamp):
    """The reference-frame ring samples as iso-latitude rings, for :func:`synthesize_iso`, or None.

    Sample k of the circles about the centres of one iso-latitude group lies at one colatitude, at the
    centres' longitudes shifted by one angle: when those longitudes are equally spaced (HEALPix
    rings), the group's k-th samples form one ring of equally spaced points, which ducc0's ring
    synthesis evaluates exactly (no interpolation) with one Legendre recursion per ring.  Returns a
    dict (theta, nphi, phi0, ringstart, order) with the map laid out as (centre in ``order``, sample)
    rows, or None when some group is not equally spaced.  Kept per process like :func:`ring_geometry`.
    """
    c = np.ascontiguousarray(np.atleast_2d(centres), dtype=float)
    nsamp = int(nsamp)
    key = ("iso", _digest(c), float(radius_rad), nsamp)
    hit = _GEOM_CACHE.get(key)
    if hit is not None:
        return hit[0]
    theta, phi, group, dlon = ring_geometry(c, radius_rad, nsamp)
    lon = np.arctan2(c[:, 1], c[:, 0]) % (2 * np.pi)
    order = np.lexsort((lon, group))
    g_sorted = group[order]
    ng = theta.shape[0]
    counts = np.bincount(group, minlength=ng)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    first = order[starts]                                  # lowest longitude of each group
    lon_sorted = lon[order]
    step = 2 * np.pi / counts[g_sorted]
    expect = lon_sorted[starts][g_sorted] + step * (np.arange(order.size) - starts[g_sorted])
    dev = np.abs((lon_sorted - expect + np.pi) % (2 * np.pi) - np.pi)
    if dev.size and dev.max() > 1e-9:
        return None
    shift = dlon[first]                                    # first centre's longitude minus the representative's
    plan = dict(
        theta=np.ascontiguousarray(theta.reshape(-1)),
        nphi=np.repeat(counts, nsamp).astype(np.uintp),
        phi0=np.ascontiguousarray(((phi + shift[:, None]) % (2 * np.pi)).reshape(-1)),
        ringstart=(np.repeat(starts * nsamp, nsamp) + np.tile(np.arange(nsamp), ng)).astype(np.uintp),
        order=order, nsamp=nsamp, n=c.shape[0])
    nbytes = sum(v.nbytes for v in plan.values() if isinstance(v, np.ndarray))
    return _cache_put(key, plan, nbytes)


ISO_COST_LIMIT = 150.0    # ring synthesis when lmax^2 / (mean points per ring) is below this


def iso_wins(lmax, plan):
    """Whether ducc0's ring synthesis beats its general-position synthesis for this plan.

    The ring synthesis costs about lmax^2 per ring (one Legendre recursion) shared by the ring's
    points; the general one a roughly constant amount per point.  Measured on this project's machine
    (ducc0 0.42, one thread; rings of radius 50 deg): ring / general time 1.2 at lmax 128 with
    nside_centers 32 (lmax^2 / points per ring = 224), 0.57 at lmax 128 with nside_centers 64 (102),
    3.9 at lmax 383 with nside_centers 64 (917); the limit sits below the break-even near 190.
    """
    per_ring = plan["n"] / max(1, int(plan["nphi"].size) // max(1, plan["nsamp"]))
    return float(lmax) ** 2 / max(per_ring, 1e-9) < ISO_COST_LIMIT


def synthesize_iso(alm, lmax, plan, nthreads=1):
    """Ring values (n, nsamp) of the reference-frame circles from an :func:`iso_latitude_plan`."""
    import ducc0

    lmax = int(lmax)
    a = np.ascontiguousarray(np.asarray(alm, dtype=np.complex128).reshape(1, -1))
    m = np.arange(lmax + 1)
    mstart = (m * (2 * lmax + 1 - m) // 2).astype(np.uintp)         # healpy order: index(l, m) = mstart[m] + l
    n, nsamp = plan["n"], plan["nsamp"]
    out = np.empty((1, n * nsamp), dtype=np.float64)
    ducc0.sht.synthesis(alm=a, theta=plan["theta"], lmax=lmax, mmax=lmax, mstart=mstart, nphi=plan["nphi"],
                        phi0=plan["phi0"], ringstart=plan["ringstart"], spin=0, pixstride=nsamp,
                        nthreads=max(1, int(nthreads)), map=out)
    vals = np.empty((n, nsamp), dtype=np.float64)
    vals[plan["order"]] = out[0].reshape(n, nsamp)
    return vals


def ring_mask_weights(mask, centres, radius_rad, nsamp):
    """Mask weights (n, nsamp) float32 at the reference-frame ring samples (as :func:`mask_at` at
    :func:`ring_points`), kept per process as bits when the mask is 0/1 (same mask, centres, radius,
    samples)."""
    if mask is None:
        return None
    c = np.ascontiguousarray(np.atleast_2d(centres), dtype=float)
    m = np.asarray(mask)
    binary = m.dtype == bool or bool(np.all((m == 0) | (m == 1)))
    if not binary:
        return mask_at(m, ring_points(c, radius_rad, nsamp))
    key = ("mask", _digest(c), _digest(m > 0.5), float(radius_rad), int(nsamp))
    hit = _GEOM_CACHE.get(key)
    if hit is not None:
        return np.unpackbits(hit[0], axis=-1, count=int(nsamp)).astype(np.float32)
    w = mask_at(m, ring_points(c, radius_rad, nsamp))
    packed = np.packbits(w > 0.5, axis=-1)
    _cache_put(key, packed, packed.nbytes)
    return w


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
