"""Closed geodesics of a flat space E^3 / Gamma: the group as arrays, clone distances, shortest loops.

Pure geometry over numpy arrays (used by the exclusion stage, twinring.exclude, and by
twinring.topology.geometry).  Every element g(x) = R x + t of Gamma other than the identity is a
closed geodesic; lengths are in units of chi.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import manifolds as M

_EPS = 1e-9


# --------------------------------------------------------------------------- group arrays
@dataclass(frozen=True)
class GroupArrays:
    """A flat space's group as arrays: one (R, t) per holonomy element and the translation lattice.

    Every element is x -> R_h x + t_h + lattice @ n for a holonomy index h and integers n.
    ``lattice`` columns in chi; ``open_dirs`` unit columns of the non-compact directions.
    """

    R: np.ndarray          # (H, 3, 3), identity first
    t: np.ndarray          # (H, 3)
    lattice: np.ndarray    # (3, m)
    open_dirs: np.ndarray  # (3, 3 - m)


def group_arrays(space: M.Space) -> GroupArrays:
    R = np.stack([h.R for _, h in space.holonomy])
    t = np.stack([h.t for _, h in space.holonomy])
    if not (np.allclose(R[0], np.eye(3)) and np.allclose(t[0], 0.0)):
        raise ValueError("holonomy list must start with the identity")
    return GroupArrays(R=R, t=t, lattice=np.asarray(space.lattice, float), open_dirs=np.asarray(space.open_dirs))


def fixed_projector(R, tol=1e-8):
    """Orthogonal projector onto the fixed space {v : R v = v} of an orthogonal matrix."""
    _, s, vt = np.linalg.svd(np.asarray(R, float) - np.eye(3))
    null = vt[s < tol]
    return null.T @ null


def shortest_lattice_vector(lattice) -> float:
    """Length of the shortest nonzero vector of the lattice spanned by the columns (inf for none)."""
    lattice = np.asarray(lattice, float)
    if lattice.shape[1] == 0:
        return math.inf
    r = float(np.min(np.linalg.norm(lattice, axis=0))) * (1 + _EPS)
    n = M.lattice_points_within(lattice, np.zeros(3), r + _EPS)
    v = np.linalg.norm(n @ lattice.T, axis=1)
    return float(np.min(v[v > _EPS]))


def displacements(G: GroupArrays, x, radius):
    """All non-identity elements g with |g x - x| < radius.

    Returns ``(u, h)``: u (N, 3) the vectors g x - x (chi) and h (N,) the holonomy index of each.
    """
    x = np.asarray(x, float)
    us, hs = [], []
    for k in range(G.R.shape[0]):
        v = G.R[k] @ x + G.t[k] - x
        n = M.lattice_points_within(G.lattice, v, radius)
        if n.shape[0] == 0:
            continue
        u = v + (n @ G.lattice.T if n.shape[1] else 0.0)
        if k == 0:
            u = u[np.linalg.norm(u, axis=1) > _EPS]
        us.append(u)
        hs.append(np.full(len(u), k))
    if not us:
        return np.zeros((0, 3)), np.zeros(0, int)
    return np.concatenate(us), np.concatenate(hs)


def clone_distance(G: GroupArrays, x) -> float:
    """Smallest |g x - x| over non-identity g (chi): the shortest closed geodesic through x."""
    upper = shortest_lattice_vector(G.lattice)
    if not math.isfinite(upper):
        return math.inf
    u, _ = displacements(G, x, upper * (1 + 1e-7) + _EPS)
    return float(np.min(np.linalg.norm(u, axis=1)))


def loop_lengths(G: GroupArrays):
    """Per holonomy element h: the shortest loop min_n |P_h (t_h + lattice n)| among the elements with rotation R_h.

    P_h projects onto the fixed space of R_h.  Conjugating by a translation lambda changes t by
    (I - R) lambda, which P_h removes, so the minimum only needs one representative per class of
    n modulo (I - R_h) lattice: the enumeration radius sqrt(U^2 + W^2) with U the shortest lattice
    vector (an upper bound on the overall minimum) and W = |(I - P) t_h| + 1/2 sum_i |(I - R_h) a_i| (a bound
    on the covering radius of (I - R_h) lattice in its span) contains one.  Entry 0 (identity
    rotation) is the shortest lattice vector.  Entries above U are only bounds (inf when no element of
    the class is that short); the overall minimum is exact.
    """
    U = shortest_lattice_vector(G.lattice)
    out = np.full(G.R.shape[0], math.inf)
    out[0] = U
    if not math.isfinite(U):
        return out
    for k in range(1, G.R.shape[0]):
        R, t = G.R[k], G.t[k]
        P = fixed_projector(R)
        W = np.linalg.norm(t - P @ t) + 0.5 * float(np.sum(np.linalg.norm((np.eye(3) - R) @ G.lattice, axis=0)))
        radius = math.hypot(U, W) * (1 + 1e-7) + _EPS
        n = M.lattice_points_within(G.lattice, t, radius)
        if n.shape[0]:
            v = t + n @ G.lattice.T
            out[k] = float(np.min(np.linalg.norm(v @ P.T, axis=1)))
    return out


def loop_min(G: GroupArrays) -> float:
    """The shortest closed geodesic anywhere in the space (chi); independent of the observer."""
    return float(np.min(loop_lengths(G)))


def axis_offset(G: GroupArrays, x, loops=None, tol=1e-7) -> float:
    """Distance (chi) from x to the nearest closed geodesic of length loop_min.

    For g = (R, t) the points moved least form the affine space y* + Fix(R); with u = g x - x and
    P the projector on Fix(R), |g x - x|^2 = |P t|^2 + |u - P t|^2 and the distance from x to that
    set is |pinv(R - I) (u - P t)|; for a translation it is 0.  Elements of length loop_min whose
    set lies within D of x have |u|^2 <= loop_min^2 + 4 D^2, so one pass bounded by the distance
    found (or by the cell's size) finds the nearest.
    """
    x = np.asarray(x, float)
    loops = loop_lengths(G) if loops is None else loops
    L = float(np.min(loops))
    if not math.isfinite(L):
        return math.nan
    if loops[0] <= L * (1 + tol) + _EPS:
        return 0.0
    cands = [k for k in range(1, len(loops)) if loops[k] <= L * (1 + tol) + _EPS]
    # a bound on the distance to some such set: half the cell's diagonal sum plus the observer's offset
    # along open directions (every loop's set can be moved by the lattice next to the cell)
    xo = G.open_dirs.T @ x if G.open_dirs.shape[1] else np.zeros(0)
    D = 0.5 * float(np.sum(np.linalg.norm(G.lattice, axis=0))) + float(np.linalg.norm(xo)) + L
    best = math.inf
    for _ in range(60):
        radius = math.sqrt(L * L + 4 * D * D) * (1 + 1e-7) + _EPS
        u, h = displacements(G, x, radius)
        for k in cands:
            sel = h == k
            if not np.any(sel):
                continue
            R = G.R[k]
            P = fixed_projector(R)
            Pt = u[sel] @ P.T          # P (R x + t - x) = P t for every element of this class
            keep = np.abs(np.linalg.norm(Pt, axis=1) - L) <= L * tol + _EPS
            if not np.any(keep):
                continue
            perp = (u[sel] - Pt)[keep]
            off = np.linalg.norm(perp @ np.linalg.pinv(R - np.eye(3)).T, axis=1)
            best = min(best, float(np.min(off)))
        if best <= D * (1 + 1e-9):
            break             # every element whose set lies within D was enumerated
        D = best if math.isfinite(best) else 2.0 * D
    return best


def separations_deg(u, R):
    """Centre separation (deg) of the circle pair of each element: 180 - angle(u, R u); u (N, 3), R (N, 3, 3)."""
    u = np.asarray(u, float)
    Ru = np.einsum("nij,nj->ni", R, u)
    c = np.einsum("ni,ni->n", u, Ru) / np.maximum(np.einsum("ni,ni->n", u, u), 1e-300)
    return 180.0 - np.degrees(np.arccos(np.clip(c, -1.0, 1.0)))
