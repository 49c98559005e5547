"""Predicted circle pairs from the group elements (flat space, chi = 1).

An element g with d = |g x0 - x0| < 2 makes the last-scattering sphere meet
its image in a circle of angular radius alpha, cos(alpha) = d / 2, centred on
g x0 - x0; its partner is centred on g^-1 x0 - x0 (Cornish, Spergel & Starkman
1998, CQG 15, 2657).  g and g^-1 give the same physical pair: each is listed
once (circle 1 is the one whose centre comes first in descending z, y, x).

Twist and sense are measured numerically in the search's own conventions
(twinring.rings): points of circle 1 at phases phi are mapped through g^-1 and
their phases psi on circle 2 are read with ``phase_of``; psi = twist + phi
means ``flip = False``, psi = twist - phi means ``flip = True``.
"""
from __future__ import annotations

import numpy as np
from astropy.table import Table

from .. import rings
from .manifolds import Space, elements_within

N_FIT = 48


def _order_key(v, nd=9):
    v = np.round(v, nd) + 0.0
    return (v[2], v[1], v[0])


def phase_map_fit(phi, psi):
    """(twist_deg, flip) of a map of phase phi on circle 1 to phase psi on circle 2.

    The map must be psi = twist + phi (flip false) or psi = twist - phi (flip true); anything
    else is an error (the conventions of twinring.rings, used by flat and spherical predictions).
    """
    best = None
    for flip, u in ((False, psi - phi), (True, psi + phi)):
        z = np.exp(1j * u)
        mean = z.mean()
        spread = float(np.max(np.abs(z - mean / abs(mean)))) if abs(mean) > 0 else 2.0
        if best is None or spread < best[2]:
            best = (rings.wrap_twist_deg(np.degrees(np.angle(mean))), flip, spread)
    twist, flip, spread = best
    if spread > 1e-6:
        raise RuntimeError(f"circle map is not a rotation or reflection of phase (spread {spread:.2e})")
    if twist > 360.0 - 1e-9:
        twist = 0.0
    return twist, flip


def twist_and_flip(g, x0, c1, c2, alpha, nfit=N_FIT):
    """(twist_deg, flip) of the pair made by g: circle 1 about c1, circle 2 about c2."""
    phi = 2 * np.pi * np.arange(nfit) / nfit
    p = rings.ring_points(c1, alpha, nfit, other=c2)[0]
    y = g.inverse()(x0 + p) - x0
    psi = rings.phase_of(y, np.broadcast_to(c2, y.shape), other=np.broadcast_to(c1, y.shape))
    return phase_map_fit(phi, psi)


def pair_row(c1, c2, alpha, twist, flip, **extra) -> dict:
    """One predicted pair as a row: centres as lon/lat, radius ``alpha`` (rad) in degrees, plus ``extra``."""
    lon1, lat1 = rings.vec_to_lonlat(c1)
    lon2, lat2 = rings.vec_to_lonlat(c2)
    return dict(radius_deg=float(np.degrees(alpha)), lon1_deg=float(lon1), lat1_deg=float(lat1),
                lon2_deg=float(lon2), lat2_deg=float(lat2), separation_deg=float(rings.separation_deg(c1, c2)),
                twist_deg=twist, flip=bool(flip), **extra)


def predict_pairs(space: Space, max_distance=2.0):
    """List of dicts, one per physical circle pair, largest radius first."""
    x0 = space.observer
    rows = []
    for label, g, d in elements_within(space, max_distance):
        if d < 1e-12 or d >= max_distance - 1e-9:   # images that only touch the sphere give no circle
            continue
        u1 = g(x0) - x0
        u2 = g.inverse()(x0) - x0
        c1, c2 = rings.unit(u1), rings.unit(u2)
        if _order_key(c1) < _order_key(c2):
            continue          # the inverse element lists this pair
        alpha = float(np.arccos(np.clip(d / 2.0, -1.0, 1.0)))
        twist, flip = twist_and_flip(g, x0, c1, c2, alpha)
        rows.append(pair_row(c1, c2, alpha, twist, flip, element=label, distance=float(d),
                             orientation_reversing=bool(np.linalg.det(g.R) < 0)))
    rows.sort(key=lambda r: (-r["radius_deg"], r["lat1_deg"], r["lon1_deg"]))
    return rows


COLUMNS = ("radius_deg", "lon1_deg", "lat1_deg", "lon2_deg", "lat2_deg", "separation_deg", "twist_deg", "flip",
           "element", "distance")
UNITS = {"radius_deg": "deg", "lon1_deg": "deg", "lat1_deg": "deg", "lon2_deg": "deg", "lat2_deg": "deg",
         "separation_deg": "deg", "twist_deg": "deg"}


def circles_table(rows, meta) -> Table:
    """The predicted pairs (dicts of :func:`predict_pairs`) as a table with ``COLUMNS``, units and ``meta``."""
    dtypes = (float, float, float, float, float, float, float, bool, str, float)
    t = Table(names=COLUMNS, dtype=dtypes) if not rows else Table(rows=[[r[c] for c in COLUMNS] for r in rows],
                                                                  names=COLUMNS, dtype=dtypes)
    for c, u in UNITS.items():
        t[c].unit = u
    t.meta.update(meta)
    return t


def predict_circles(space: Space, max_distance=2.0) -> Table:
    """Astropy table of the predicted pairs (columns ``COLUMNS``; distance in units of chi)."""
    return circles_table(predict_pairs(space, max_distance), space_meta(space))


def space_meta(space: Space) -> dict:
    return {
        "space": space.name,
        "space_title": space.title,
        "lengths_chi": [round(x, 12) for x in space.lengths_chi],
        "angles_deg": None if space.angles_deg is None else list(space.angles_deg),
        "observer_chi_map_frame": [round(float(x), 12) for x in space.observer],
        "holonomy_order": space.holonomy_order(),
        "orientable": space.orientable,
        "conventions": "cos(radius) = distance / 2 (chi = 1); circle 1 phase phi matches circle 2 phase "
                       "phi + twist (flip false) or twist - phi (flip true); phase frames of twinring.rings",
    }
