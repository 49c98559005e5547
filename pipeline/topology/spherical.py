"""Spherical spaces S^3 / Gamma: geometry, groups and predicted circle pairs.

Model space
    S^3 is the set of unit quaternions x = w + x i + y j + z k, stored as arrays
    ``(..., 4)`` in the order (w, x, y, z).  Distances are in curvature radii R:
    d(x, y) = arccos <x, y> (computed as 2 atan2(|x - y|, |x + y|), accurate near
    0 and pi).  Every orientation-preserving isometry is x -> a x conj(b) for unit
    quaternions a, b (the pair (-a, -b) is the same isometry).

Groups (each element stored as the pair (a, b), with its 4 x 4 matrix)
    ``L(p,q)``  the cyclic group Z_p acting on S^3 in C^2 (z1 = w + x i,
                z2 = y + z i, x = z1 + z2 j) by (z1, z2) -> (e^{2 pi i/p} z1,
                e^{2 pi i q/p} z2); as quaternions x -> a x conj(b) with
                a = e^{i pi (1+q)/p}, conj(b) = e^{i pi (1-q)/p}: a double action
                unless q = 1 (left Clifford translation) or q = p - 1 (right).
    ``D*4n``    binary dihedral group {e^{i pi k/n}, e^{i pi k/n} j}, 4n elements
                (n >= 2), acting by left multiplication (prism manifolds).
    ``T*``      binary tetrahedral group, 24 elements, left multiplication.
    ``O*``      binary octahedral group, 48 elements.
    ``I*``      binary icosahedral group, 120 elements (Poincare dodecahedral space).
    Only the single-action (left multiplication) members of the prism and
    polyhedral families are built here; the further double-action quotients
    (e.g. D*4n x Z_m, T* x Z_m) are not.

Observer and sky
    The observer sits at the unit quaternion x0.  A direction on the sky n
    (a unit 3-vector in the map frame) and a distance r (in R) name the point
    exp_x0(r n) = x0 (cos r + sin r Q^T n), with n read as a pure quaternion and
    Q the domain-to-map rotation (Euler z-y-z, as for the flat spaces): tangent
    vectors at x0 are left translates of the pure quaternions.  ``log_map`` is its
    inverse.  For left-multiplication groups every observer sees the same circles
    (Clifford translations move every point by the same distance); for double
    actions the observer matters.

Circles
    An element g with d = d(x0, g x0) < 2 chi/R makes the last-scattering sphere
    (radius chi/R about x0) meet its image in a circle of angular radius alpha,
    cos alpha = tan(d/2) / tan(chi/R) (Cornish, Spergel & Starkman 1998, CQG 15,
    2657), centred on the direction of g x0; its partner is centred on the
    direction of g^-1 x0.  Twist and sense are measured numerically in
    twinring.rings' conventions, by mapping points of circle 1 through g^-1
    (T(y) = T(g^-1 y)) and reading their phases on circle 2, as
    ``circles.twist_and_flip`` does for flat spaces.
"""
from __future__ import annotations

import itertools
import math
import re
from dataclasses import dataclass

import numpy as np

from .. import rings

SPHERICAL_FAMILIES = ("L(p,q)", "D*4n", "T*", "O*", "I*")
NAME_TEXT = "L(p,q) with p >= 2, 1 <= q < p, gcd(p, q) = 1 (e.g. L(8,1)) | D*4n with n >= 2 (e.g. D*12) | T* | O* | I*"
MAX_ORDER = 5000
TITLES = {"L": "lens space", "D*": "prism manifold (binary dihedral group, left action)",
          "T*": "binary tetrahedral space", "O*": "binary octahedral space",
          "I*": "Poincare dodecahedral space (binary icosahedral group)"}
PHI = (1.0 + math.sqrt(5.0)) / 2.0


class SphericalParamError(ValueError):
    """A bad spherical-space parameter: ``key``, what was ``found``, what is ``allowed``."""

    def __init__(self, key, found, allowed):
        super().__init__(f"{key}: found {found!r}; allowed: {allowed}")
        self.key, self.found, self.allowed = key, found, allowed


# --------------------------------------------------------------------------- quaternions
def qmul(a, b):
    """Quaternion product a b (arrays (..., 4), order w, x, y, z; broadcasting)."""
    a = np.asarray(a, float)
    b = np.asarray(b, float)
    aw, ax, ay, az = np.moveaxis(a, -1, 0)
    bw, bx, by, bz = np.moveaxis(b, -1, 0)
    return np.stack([aw * bw - ax * bx - ay * by - az * bz,
                     aw * bx + ax * bw + ay * bz - az * by,
                     aw * by - ax * bz + ay * bw + az * bx,
                     aw * bz + ax * by - ay * bx + az * bw], axis=-1)


def qconj(a):
    a = np.asarray(a, float)
    return a * np.array([1.0, -1.0, -1.0, -1.0])


def qexp(v):
    """exp of a pure quaternion given as a 3-vector v (rotation vector / geodesic step in R)."""
    v = np.asarray(v, float)
    t = np.linalg.norm(v, axis=-1, keepdims=True)
    s = np.where(t > 0, np.sin(t) / np.where(t > 0, t, 1.0), 1.0)
    return np.concatenate([np.cos(t), s * v], axis=-1)


def left_matrix(a):
    """4 x 4 matrix of x -> a x."""
    return np.stack([qmul(a, e) for e in np.eye(4)], axis=-1)


def right_matrix(b):
    """4 x 4 matrix of x -> x b."""
    return np.stack([qmul(e, b) for e in np.eye(4)], axis=-1)


def distance(x, y):
    """Geodesic distance on the unit S^3 (radians = curvature radii), robust near 0 and pi."""
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    return 2.0 * np.arctan2(np.linalg.norm(x - y, axis=-1), np.linalg.norm(x + y, axis=-1))


# --------------------------------------------------------------------------- isometries
@dataclass(frozen=True)
class S3Isometry:
    """x -> a x conj(b) (a, b unit quaternions); ``label`` names it in tables."""

    a: np.ndarray
    b: np.ndarray
    label: str = ""

    @property
    def matrix(self) -> np.ndarray:
        return left_matrix(self.a) @ right_matrix(qconj(self.b))

    def __call__(self, x):
        return qmul(qmul(self.a, x), qconj(self.b))

    def __matmul__(self, other: "S3Isometry") -> "S3Isometry":
        """(self @ other)(x) = self(other(x))."""
        return S3Isometry(qmul(self.a, other.a), qmul(self.b, other.b))

    def inverse(self) -> "S3Isometry":
        return S3Isometry(qconj(self.a), qconj(self.b), self.label + "^-1" if self.label else "")

    def is_identity(self, tol=1e-9) -> bool:
        return bool(np.allclose(self.matrix, np.eye(4), atol=tol))

    def has_fixed_point(self, tol=1e-9) -> bool:
        """Whether some point of S^3 is fixed: M - I singular (a fixed vector of R^4)."""
        return bool(np.linalg.svd(self.matrix - np.eye(4), compute_uv=False)[-1] < tol)

    def displacement(self) -> tuple:
        """(smallest, largest) distance any point moves: for x -> a x conj(b) these are
        |theta_a - theta_b| and theta_a + theta_b (cos theta = Re), the Clifford case having both equal."""
        ta = math.acos(max(-1.0, min(1.0, float(self.a[0]))))
        tb = math.acos(max(-1.0, min(1.0, float(self.b[0]))))
        return abs(ta - tb), min(ta + tb, 2 * math.pi - ta - tb)


def _mkey(M, nd=7):
    return tuple(np.round(M, nd).ravel() + 0.0)


def close_group(generators, max_order=MAX_ORDER):
    """All elements generated by ``generators`` (S3Isometry), identity first, breadth-first."""
    ident = S3Isometry(np.array([1.0, 0, 0, 0]), np.array([1.0, 0, 0, 0]), "identity")
    out = [ident]
    seen = {_mkey(ident.matrix)}
    frontier = [ident]
    while frontier:
        nxt = []
        for h in frontier:
            for g in generators:
                e = g @ h
                k = _mkey(e.matrix)
                if k not in seen:
                    seen.add(k)
                    out.append(e)
                    nxt.append(e)
                    if len(out) > max_order:
                        raise SphericalParamError("space", None, f"a finite group of at most {max_order} elements")
        frontier = nxt
    return out


def _qfmt(a):
    return "(" + ",".join(f"{v:+.4f}" for v in np.round(a, 4) + 0.0) + ")"


def _label_left(elements):
    return [S3Isometry(e.a, e.b, "identity" if e.is_identity() else "left " + _qfmt(e.a)) for e in elements]


def binary_tetrahedral():
    """The 24 unit quaternions of T* (list of 4-vectors)."""
    el = [s * e for e in np.eye(4) for s in (1.0, -1.0)]
    el += [np.array(s) / 2.0 for s in itertools.product((1.0, -1.0), repeat=4)]
    return el


def binary_octahedral():
    el = binary_tetrahedral()
    for u, v in itertools.combinations(range(4), 2):
        for su, sv in itertools.product((1.0, -1.0), repeat=2):
            q = np.zeros(4)
            q[u], q[v] = su / math.sqrt(2.0), sv / math.sqrt(2.0)
            el.append(q)
    return el


def _even_permutations(n):
    out = []
    for p in itertools.permutations(range(n)):
        inv = sum(1 for i in range(n) for j in range(i + 1, n) if p[i] > p[j])
        if inv % 2 == 0:
            out.append(p)
    return out


def binary_icosahedral():
    el = binary_tetrahedral()
    base = (0.0, 1.0, 1.0 / PHI, PHI)
    for perm in _even_permutations(4):
        for s in itertools.product((1.0, -1.0), repeat=3):
            v = np.array([0.0, s[0] * base[1], s[1] * base[2], s[2] * base[3]]) / 2.0
            q = np.empty(4)
            q[list(perm)] = v
            el.append(q)
    return el


def binary_dihedral(n):
    el = []
    j = np.array([0.0, 0.0, 1.0, 0.0])
    for k in range(2 * n):
        a = np.array([math.cos(math.pi * k / n), math.sin(math.pi * k / n), 0.0, 0.0])
        el += [a, qmul(a, j)]
    return el


def lens_generator(p, q):
    """x -> a x conj(b) acting as (z1, z2) -> (e^{2 pi i/p} z1, e^{2 pi i q/p} z2)."""
    th = math.pi * (1 + q) / p        # a = e^{i th}
    ph = math.pi * (1 - q) / p        # conj(b) = e^{i ph}
    a = np.array([math.cos(th), math.sin(th), 0.0, 0.0])
    b = np.array([math.cos(ph), -math.sin(ph), 0.0, 0.0])
    return S3Isometry(a, b, "g")


def parse_name(name):
    """('L', p, q) | ('D*', n) | ('T*',) | ('O*',) | ('I*',) or None when not a spherical space name."""
    if not isinstance(name, str):
        return None
    s = name.replace(" ", "")
    m = re.fullmatch(r"L\((\d+),(\d+)\)", s)
    if m:
        return ("L", int(m.group(1)), int(m.group(2)))
    m = re.fullmatch(r"D\*(\d+)", s)
    if m:
        return ("D*", int(m.group(1)))
    if s in ("T*", "O*", "I*"):
        return (s,)
    return None


def is_spherical_name(name) -> bool:
    return parse_name(name) is not None


def check_name(name):
    """Raise SphericalParamError unless ``name`` is a valid spherical space; return the parsed tuple."""
    t = parse_name(name)
    if t is None:
        raise SphericalParamError("space", name, NAME_TEXT)
    if t[0] == "L":
        p, q = t[1], t[2]
        if not (2 <= p <= MAX_ORDER and 1 <= q < p and math.gcd(p, q) == 1):
            raise SphericalParamError("space", name, NAME_TEXT + f" (p <= {MAX_ORDER})")
    if t[0] == "D*":
        if t[1] % 4 or not (8 <= t[1] <= MAX_ORDER):
            raise SphericalParamError("space", name, NAME_TEXT + f" (4n a multiple of 4, 8 <= 4n <= {MAX_ORDER})")
    return t


def left_quaternions(name):
    """The unit quaternions a of a left-multiplication group (D*4n, T*, O*, I*) as an array (|Gamma|, 4),
    without building labelled isometries (fast for large prism groups); None for lens spaces."""
    t = check_name(name)
    if t[0] == "L":
        return None
    if t[0] == "D*":
        return np.array(binary_dihedral(t[1] // 4))
    return np.array({"T*": binary_tetrahedral, "O*": binary_octahedral, "I*": binary_icosahedral}[t[0]]())


def group_elements(name):
    """The group of the named space: list of S3Isometry, identity first."""
    t = check_name(name)
    if t[0] == "L":
        p, q = t[1], t[2]
        g = lens_generator(p, q)
        out, h = [], S3Isometry(np.array([1.0, 0, 0, 0]), np.array([1.0, 0, 0, 0]), "identity")
        for k in range(p):
            out.append(S3Isometry(h.a, h.b, "identity" if k == 0 else f"g^{k}"))
            h = g @ h
        return out
    one = np.array([1.0, 0.0, 0.0, 0.0])
    if t[0] == "D*":
        quats = binary_dihedral(t[1] // 4)
    else:
        quats = {"T*": binary_tetrahedral, "O*": binary_octahedral, "I*": binary_icosahedral}[t[0]]()
    quats.sort(key=lambda a: (-round(a[0], 9), tuple(-np.round(a[1:], 9))))
    return _label_left([S3Isometry(np.asarray(a, float), one) for a in quats])


# --------------------------------------------------------------------------- the space
@dataclass(frozen=True)
class SphericalSpace:
    """S^3 / Gamma seen from ``observer`` (unit quaternion), sky turned by ``rotation`` (domain -> map)."""

    name: str
    elements: tuple            # S3Isometry, identity first
    observer: np.ndarray       # (4,) unit quaternion
    rotation: np.ndarray       # (3, 3)
    chi_over_r: float          # radius of the last-scattering sphere, curvature radii

    @property
    def order(self) -> int:
        return len(self.elements)

    def holonomy_order(self) -> int:
        return self.order

    @property
    def orientable(self) -> bool:
        return True

    @property
    def compact(self) -> bool:
        return True

    @property
    def title(self) -> str:
        t = parse_name(self.name)
        return TITLES[t[0]]

    def point(self, directions, r):
        """Points exp_x0(r n) of S^3 for map-frame unit vectors ``directions`` (..., 3) at distance r."""
        n = np.asarray(directions, float) @ self.rotation       # Q^T n, row vectors
        r = np.asarray(r, float)[..., None]
        u = np.concatenate([np.cos(r) * np.ones(n.shape[:-1] + (1,)), np.sin(r) * n], axis=-1)
        return qmul(self.observer, u)

    def log_map(self, y):
        """(map-frame unit direction (..., 3), distance (...)) of points y seen from the observer."""
        u = qmul(qconj(self.observer), y)
        v = u[..., 1:]
        s = np.linalg.norm(v, axis=-1)
        r = np.arctan2(s, u[..., 0])
        n = v / np.where(s > 0, s, 1.0)[..., None]
        return n @ self.rotation.T, r

    def volume(self) -> float:
        """Volume in R^3: 2 pi^2 / |Gamma|."""
        return 2 * math.pi**2 / self.order


def observer_quaternion(observer):
    """The observer as a unit quaternion: 4 numbers (normalised) or 3 numbers v (exp of v, curvature radii)."""
    v = np.asarray(observer, float)
    if v.shape == (4,):
        nv = np.linalg.norm(v)
        if not np.isfinite(nv) or nv == 0:
            raise SphericalParamError("observer", list(observer), OBSERVER_TEXT)
        return v / nv
    if v.shape == (3,) and np.all(np.isfinite(v)):
        return qexp(v)
    raise SphericalParamError("observer", list(observer), OBSERVER_TEXT)


OBSERVER_TEXT = ("for a spherical space, 4 numbers [w, x, y, z] (a quaternion, normalised) or 3 numbers "
                 "(a step from the identity along a tangent vector, in curvature radii)")


def build_spherical(name, chi_over_r, observer=(0.0, 0.0, 0.0), euler_deg=(0.0, 0.0, 0.0)) -> SphericalSpace:
    from .manifolds import euler_matrix

    check_name(name)
    if not (0.0 < chi_over_r < math.pi / 2):
        raise SphericalParamError("omega_k", chi_over_r,
                                  "a curvature giving 0 < chi/R < pi/2 (the last-scattering sphere within a hemisphere)")
    x0 = observer_quaternion(observer)
    return SphericalSpace(name=name.replace(" ", ""), elements=tuple(group_elements(name)), observer=x0,
                          rotation=euler_matrix(euler_deg), chi_over_r=float(chi_over_r))


# --------------------------------------------------------------------------- circles
def circle_radius(d, chi_over_r):
    """Angular radius (radians) of the circle made by an image at distance d (curvature radii), nan if none.

    cos alpha = tan(d / 2) / tan(chi / R) (Cornish, Spergel & Starkman 1998).
    """
    from .geometry import circle_radius_deg

    k = float(chi_over_r)
    return np.radians(circle_radius_deg(np.asarray(d, float) / k, k))


def twist_and_flip(space: SphericalSpace, g: S3Isometry, c1, c2, alpha, nfit=48):
    """(twist_deg, flip) of the pair made by g: points of circle 1 mapped through g^-1 onto circle 2."""
    phi = 2 * np.pi * np.arange(nfit) / nfit
    p = rings.ring_points(c1, alpha, nfit, other=c2)[0]
    y = space.point(p, space.chi_over_r)
    n2, r2 = space.log_map(g.inverse()(y))
    if np.max(np.abs(r2 - space.chi_over_r)) > 1e-7 or np.max(np.abs(
            np.radians(rings.separation_deg(n2, np.broadcast_to(c2, n2.shape))) - alpha)) > 1e-7:
        raise RuntimeError("mapped circle points leave the partner circle")
    psi = rings.phase_of(n2, np.broadcast_to(c2, n2.shape), other=np.broadcast_to(c1, n2.shape))
    from .circles import phase_map_fit

    return phase_map_fit(phi, psi)


def images_within(space: SphericalSpace, max_distance):
    """[(g, d)] for non-identity elements with d(x0, g x0) < max_distance, nearest first."""
    x0 = space.observer
    out = []
    for g in space.elements[1:]:
        d = float(distance(x0, g(x0)))
        if d < max_distance:
            out.append((g, d))
    out.sort(key=lambda e: (e[1], e[0].label))
    return out


def predict_pairs(space: SphericalSpace):
    """List of dicts, one per physical circle pair, largest radius first (columns of circles.COLUMNS).

    ``distance`` is the image distance in units of chi (as for flat spaces); ``distance_r`` in R.
    """
    from .circles import _order_key, pair_row

    chi = space.chi_over_r
    x0 = space.observer
    rows = []
    for g, d in images_within(space, 2 * chi):
        if d < 1e-12 or d >= 2 * chi - 1e-9:
            continue
        c1, _ = space.log_map(g(x0))
        c2, _ = space.log_map(g.inverse()(x0))
        if _order_key(c1) < _order_key(c2):
            continue
        alpha = float(circle_radius(d, chi))
        twist, flip = twist_and_flip(space, g, c1, c2, alpha)
        rows.append(pair_row(c1, c2, alpha, twist, flip, element=g.label, distance=d / chi, distance_r=d,
                             orientation_reversing=False))
    rows.sort(key=lambda r: (-r["radius_deg"], r["lat1_deg"], r["lon1_deg"]))
    return rows


def predict_circles(space: SphericalSpace):
    """Astropy table with the flat predictions' columns; chi/R and the group in the metadata."""
    from .circles import circles_table

    return circles_table(predict_pairs(space), space_meta(space))


def space_meta(space: SphericalSpace) -> dict:
    return {
        "space": space.name,
        "space_title": space.title,
        "geometry": "spherical",
        "chi_over_r": round(space.chi_over_r, 12),
        "group_order": space.order,
        "holonomy_order": space.order,
        "orientable": True,
        "observer_quaternion": [round(float(x), 12) for x in space.observer],
        "distance_units": "chi (the image distance along the geodesic, over chi)",
        "conventions": "cos(radius) = tan(d/2) / tan(chi/R), d the image distance in curvature radii R; "
                       "circle 1 phase phi matches circle 2 phase phi + twist (flip false) or twist - phi "
                       "(flip true); phase frames of twinring.rings",
    }


def spherical_from_config(topology, cosmology, source="<config>") -> SphericalSpace:
    """Build the configured spherical space; chi/R from ``cosmology.omega_k`` (astropy background)."""
    from ..errors import InputError
    from ..cosmology import chi_over_r

    ok = float(getattr(cosmology, "omega_k", 0.0)) if cosmology is not None else 0.0
    if ok >= 0.0:
        raise InputError(f"{source}: cosmology.omega_k: found {ok!r}; allowed: a negative value (positive "
                         f"curvature) for the spherical space {topology.space}")
    try:
        return build_spherical(topology.space, chi_over_r(cosmology), topology.observer, topology.euler_deg)
    except SphericalParamError as exc:
        section = "cosmology" if exc.key == "omega_k" else "topology"
        found = ok if exc.key == "omega_k" else exc.found
        raise InputError(f"{source}: {section}.{exc.key}: found {_fmt(found)}; allowed: {exc.allowed}")


def _fmt(v):
    import json

    return repr(v) if isinstance(v, str) else json.dumps(v, default=str)


# --------------------------------------------------------------------------- injection campaigns
@dataclass(frozen=True)
class SphericalShape:
    """A spherical space for an injection campaign (twinring.inject), with plain values only.

    Its size is the curvature radius in units of chi, ``size = R / chi = 1 / (chi/R)``: every image
    distance in chi is size x (its distance in R), as a flat space's distances scale with its first
    length.  ``d1`` (``distance_per_size``) is then the nearest visible image distance in R, and a
    size shows its largest circle at cos alpha = tan(d1 / 2) / tan(1 / size) (Cornish, Spergel &
    Starkman 1998).  Sizes must exceed 2 / pi (chi / R < pi / 2).
    """

    name: str
    observer: tuple          # quaternion (4) or tangent step (3), as topology.observer
    euler_deg: tuple
    lengths: tuple = ()
    geometry: str = "spherical"
    size_definition: str = "curvature radius R in units of chi (size = R / chi; chi / R = 1 / size)"

    def at(self, size, euler_deg=None) -> SphericalSpace:
        return build_spherical(self.name, 1.0 / float(size), self.observer,
                               self.euler_deg if euler_deg is None else euler_deg)

    @staticmethod
    def chi_over_r(size) -> float:
        return 1.0 / float(size)

    def radius_deg(self, size, d1) -> float:
        """Largest visible circle radius (deg) at this size, NaN when none."""
        from .geometry import circle_radius_deg

        k = 1.0 / float(size)
        if not 0.0 < k < math.pi / 2:
            return float("nan")
        return float(circle_radius_deg(float(d1) / k, k))

    @staticmethod
    def size_for_radius(radius_deg, d1):
        """Size whose nearest visible image (d1, in R) makes a circle of radius ``radius_deg``."""
        c = np.cos(np.radians(np.asarray(radius_deg, float)))
        return 1.0 / np.arctan(math.tan(float(d1) / 2.0) / c)

    def distance_per_size(self, visible) -> float:
        """d1 (R): the nearest image making a pair that ``visible(pairs)`` keeps (the group and observer fix
        the directions, so visibility does not depend on the size); inf when none."""
        space = self.at(1.0 / 1.55)
        vis = visible(predict_pairs(space))
        return min((p["distance_r"] for p in vis), default=math.inf)


def shape_from_topology(topology) -> SphericalShape:
    check_name(topology.space)
    return SphericalShape(topology.space.replace(" ", ""), tuple(float(x) for x in topology.observer),
                          tuple(float(x) for x in topology.euler_deg))
