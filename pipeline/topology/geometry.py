"""One light geometry interface for flat (E^3 / Gamma) and spherical (S^3 / Gamma) spaces.

Every function here takes lengths in units of the last-scattering distance chi and
the curvature as ``chi_over_r`` = chi / R (0 for a flat space), so flat and
spherical code share one formula for each of:

circle radius from image distance
    an image of the observer at distance d (chi) makes a circle pair of angular
    radius alpha with (Cornish, Spergel & Starkman 1998, CQG 15, 2657)

        flat:       cos alpha = d / 2
        spherical:  cos alpha = tan(d k / 2) / tan(k),   k = chi / R,

    the second tending to the first as k -> 0 at fixed d; no circle when
    cos alpha >= 1 (d >= 2 flat, d k >= 2 k spherical).
image distance from circle radius
    the inverse: d = 2 cos alpha (flat), d = 2 arctan(cos alpha tan k) / k
    (spherical): every image nearer than that makes a circle of radius >= alpha.
distance, images within a distance, shortest loop
    of a built space (``twinring.topology.manifolds.Space`` or
    ``twinring.topology.spherical.SphericalSpace``), dispatched on its type.

Hyperbolic spaces would add one branch per function (cos alpha = tanh(d k / 2) /
tanh(k)).  Angles in degrees at this interface (NaN where there is no circle).
"""
from __future__ import annotations

import math

import numpy as np

FLAT = "flat"
SPHERICAL = "spherical"


def kind_of(space) -> str:
    """``"spherical"`` for a SphericalSpace, ``"flat"`` otherwise."""
    from .spherical import SphericalSpace

    return SPHERICAL if isinstance(space, SphericalSpace) else FLAT


def curvature_of(space) -> float:
    """chi / R of a built space: 0 for flat, the space's own value for spherical."""
    return float(space.chi_over_r) if kind_of(space) == SPHERICAL else 0.0


def _check_k(chi_over_r):
    k = float(chi_over_r)
    if not (0.0 <= k < math.pi / 2):
        raise ValueError(f"chi/R must lie in [0, pi/2): found {k}")
    return k


def circle_cos(d_chi, chi_over_r=0.0):
    """cos(alpha) of the circle made by an image at distance ``d_chi`` (chi); >= 1 means no circle."""
    k = _check_k(chi_over_r)
    d = np.asarray(d_chi, float)
    if k == 0.0:
        return d / 2.0
    return np.tan(d * k / 2.0) / math.tan(k)


def circle_radius_deg(d_chi, chi_over_r=0.0, eps=1e-12):
    """Angular radius (deg) of the circle pair made by an image at distance ``d_chi`` (chi); NaN when none.

    An image exactly at the far edge (cos alpha within ``eps`` of 1) makes no circle.
    """
    c = np.asarray(circle_cos(d_chi, chi_over_r), float)
    d = np.asarray(d_chi, float)
    with np.errstate(invalid="ignore"):
        a = np.degrees(np.arccos(np.clip(c, -1.0, 1.0)))
    return np.where((d > 0) & (c < 1.0 - eps), a, np.nan)


def distance_for_radius(alpha_deg, chi_over_r=0.0):
    """Image distance (chi) whose circle has radius ``alpha_deg``; nearer images make larger circles."""
    k = _check_k(chi_over_r)
    c = np.cos(np.radians(np.asarray(alpha_deg, float)))
    if k == 0.0:
        return 2.0 * c
    return 2.0 * np.arctan(c * math.tan(k)) / k


def distance(space, x, y):
    """Geodesic distance (chi) between points of the covering space (flat: 3-vectors in chi; spherical:
    unit quaternions)."""
    if kind_of(space) == SPHERICAL:
        from .spherical import distance as s3_distance

        return s3_distance(x, y) / space.chi_over_r
    return np.linalg.norm(np.asarray(x, float) - np.asarray(y, float), axis=-1)


def images_within(space, max_distance_chi):
    """[(element, distance in chi)] of the non-identity elements g with d(x0, g x0) < max_distance_chi,
    nearest first (flat: the group words of ``manifolds.elements_within``)."""
    if kind_of(space) == SPHERICAL:
        from .spherical import images_within as s3_images

        k = space.chi_over_r
        return [(g, d / k) for g, d in s3_images(space, max_distance_chi * k)]
    from .manifolds import elements_within

    return [(g, d) for _, g, d in elements_within(space, max_distance_chi) if 0.0 < d < max_distance_chi]


def nearest_image_distance(space) -> float:
    """Distance (chi) from the observer to its nearest image (the shortest loop through the observer)."""
    if kind_of(space) == SPHERICAL:
        from .spherical import distance as s3_distance

        x0 = space.observer
        return min(float(s3_distance(x0, g(x0))) for g in space.elements[1:]) / space.chi_over_r
    from .loops import clone_distance, group_arrays

    return clone_distance(group_arrays(space), space.observer)


def shortest_loop(space) -> float:
    """The shortest closed geodesic anywhere in the space (chi), whoever observes.

    Spherical: for x -> a x conj(b) the least displacement of any point is |theta_a - theta_b|
    (cos theta = Re); flat: the translation part along each element's fixed space
    (``twinring.topology.loops.loop_min``).
    """
    if kind_of(space) == SPHERICAL:
        return min(g.displacement()[0] for g in space.elements[1:]) / space.chi_over_r
    from .loops import group_arrays, loop_min

    return loop_min(group_arrays(space))
