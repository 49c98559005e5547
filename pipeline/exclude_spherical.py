"""What the data exclude for the spherical spaces S^3 / Gamma, as a function of Omega_k.

For a spherical space the only free size is the curvature: with the other
cosmological parameters fixed, Omega_k sets chi / R (astropy background, as
``twinring.cosmology.chi_over_r``), and the group fixes every image distance in
curvature radii R.  An observer x0 whose nearest image lies at d_min = min over
g != 1 of d(x0, g x0) sees its largest circle pair at

    cos alpha_max = tan(d_min / 2) / tan(chi / R)       (Cornish, Spergel & Starkman 1998),

so a search that sees every pair of radius >= alpha_min excludes the space for
that observer exactly when d_min <= d_crit = 2 arctan(cos alpha_min tan(chi / R)).

Observers
    The left actions (L(p,1), the prism spaces D*4n, T*, O*, I*) and L(p,p-1)
    (a right action) are Clifford translations: every point moves by the same
    distance, so every observer sees the same circles (d_min = the smallest
    arccos Re a over the group: 2 pi/p, pi/n, pi/3, pi/4, pi/5).  For L(p,q) with
    q != +-1 the observer matters.  The group acts diagonally on C^2,
    (z1, z2) -> (e^{2 pi i k/p} z1, e^{2 pi i k q/p} z2), and commutes with the torus
    of phase rotations, so an observer is characterised by u = |z1|^2 alone and

        cos d_k(u) = u cos(2 pi k/p) + (1 - u) cos(2 pi k q/p),    k = 1 .. p-1.

    Each cos d_k is linear in u, so the observer with the nearest image nearest
    (observer-minimised d_min) sits on a core circle (u = 0 or 1) with
    d_min = 2 pi / p, whatever q; the observer with the nearest image farthest
    (observer-maximised d_min) minimises the convex piecewise-linear
    max_k cos d_k(u) over [0, 1], found here by ternary search to machine
    precision.  The space is excluded (every observer sees a circle) when the
    observer-maximised d_min <= d_crit, and excluded for some observers when the
    observer-minimised d_min <= d_crit.

Coverage
    ``general`` (every pair of radius >= alpha_min) uses the exact rule above.
    ``antipodal`` and ``run`` also need each pair's centre separation: for one
    observer the pair of g is centred on the directions of g x0 and g^-1 x0, the
    tangent vectors g x0 - cos(d) x0 and g^-1 x0 - cos(d) x0 at x0, and its
    separation is the angle between them (180 deg for Clifford translations).
    The lens verdicts then run over ``OBSERVERS`` values of u spread over [0, 1]
    plus the observer-maximising one (a sampled verdict, said so in the metadata).

Outputs of the ``exclude`` stage when spherical spaces are asked for
(``exclude.spherical`` or a spherical ``topology.space``):
``exclusion_spherical.ecsv`` (one row per space and Omega_k) and
``exclusion_spherical_summary.ecsv`` (one row per Omega_k: the largest allowed p
of L(p,1), of any L(p,q) with the q allowed there, the largest allowed n of
D*4n, and the verdicts on T*, O*, I*).

Units: distances in curvature radii R (``*_r``) and Gpc (``*_gpc``), angles in degrees.
"""
from __future__ import annotations

import functools
import math

import numpy as np

from .config import InputError
from .cosmology import chi_over_r_at, curvature_radius_gpc_at
from .topology import geometry
from .topology import spherical as S

EXCLUSION_SPHERICAL = "exclusion_spherical.ecsv"
SUMMARY_SPHERICAL = "exclusion_spherical_summary.ecsv"
FAMILIES = ("L(p,1)", "L(p,q)", "D*4n", "T*", "O*", "I*")
FAMILY_TEXT = "L(p,1) | L(p,q) | D*4n | T* | O* | I* | a named space such as L(8,3) or D*12"
OBSERVERS = 17
_EPS = 1e-12


# --------------------------------------------------------------------------- curvature
def critical_distance(alpha_min_deg, chi_over_r) -> float:
    """d_crit (R): every image nearer than this makes a circle of radius >= alpha_min."""
    return float(geometry.distance_for_radius(alpha_min_deg, chi_over_r)) * float(chi_over_r)


# --------------------------------------------------------------------------- groups and observers
def lens_matrices(p, q):
    """The p - 1 non-identity elements of L(p,q) as 4 x 4 matrices (rotations of the (w,x) and (y,z) planes)."""
    k = np.arange(1, p)
    out = np.zeros((p - 1, 4, 4))
    for (i, j), ang in (((0, 1), 2 * np.pi * k / p), ((2, 3), 2 * np.pi * k * q / p)):
        c, s = np.cos(ang), np.sin(ang)
        out[:, i, i], out[:, i, j], out[:, j, i], out[:, j, j] = c, -s, s, c
    return out


def group_matrices(name):
    """Non-identity elements of the named spherical space as (|Gamma| - 1, 4, 4) matrices."""
    t = S.check_name(name)
    if t[0] == "L":
        return lens_matrices(t[1], t[2])
    a = S.left_quaternions(name)
    a = a[np.abs(a[:, 0] - 1.0) > 1e-9]                 # drop the identity
    return S.left_matrix(a)


def is_homogeneous(name) -> bool:
    """True for Clifford translations only (every point moved by the same distance): left actions,
    L(p,1) and L(p,p-1)."""
    t = S.check_name(name)
    return t[0] != "L" or t[2] in (1, t[1] - 1)


@functools.lru_cache(maxsize=4096)
def clifford_distance(name) -> float:
    """d_min (R) of a homogeneous space: the smallest displacement arccos(Re a) over the group."""
    t = S.check_name(name)
    if t[0] == "L":
        return 2 * math.pi / t[1]
    a = S.left_quaternions(name)
    re = np.clip(a[:, 0], -1.0, 1.0)
    return float(np.min(np.arccos(re[re < 1.0 - 1e-9])))          # d(x, a x) = arccos Re a for every x


def lens_lines(p, qs):
    """(A, B) with cos d_k(u) = B + (A - B) u, shapes (len(qs), p - 1)."""
    k = np.arange(1, p)
    qs = np.atleast_1d(np.asarray(qs, int))
    A = np.broadcast_to(np.cos(2 * np.pi * k / p), (qs.size, p - 1))
    B = np.cos(2 * np.pi * np.outer(qs, k) / p)
    return A, B


@functools.lru_cache(maxsize=2048)
def _lens_range_all(p):
    """{q: (d_lo, d_hi, u_hi)} for every q coprime to p (one vectorised pass)."""
    qs = [q for q in range(1, p) if math.gcd(p, q) == 1]
    lo, hi, u = lens_observer_range(p, qs)
    return {q: (float(a), float(b), float(c)) for q, a, b, c in zip(qs, lo, hi, u)}


def lens_observer_range(p, qs, iterations=100):
    """Observer-minimised and -maximised nearest-image distance of L(p,q) for each q (R).

    Returns ``(d_lo, d_hi, u_hi)`` arrays over ``qs``: d_lo = 2 pi/p (an observer on a core circle),
    d_hi the largest d_min any observer has, reached at u_hi = |z1|^2 (ternary search on the convex
    max_k cos d_k(u)).
    """
    A, B = lens_lines(p, qs)
    slope = A - B

    def F(u):
        return np.max(B + slope * u[:, None], axis=1)

    lo = np.zeros(A.shape[0])
    hi = np.ones(A.shape[0])
    for _ in range(iterations):
        m1 = lo + (hi - lo) / 3.0
        m2 = hi - (hi - lo) / 3.0
        f1, f2 = F(m1), F(m2)
        left = f1 <= f2
        hi = np.where(left, m2, hi)
        lo = np.where(left, lo, m1)
    u = 0.5 * (lo + hi)
    cands = np.stack([np.zeros_like(u), np.ones_like(u), u])
    vals = np.stack([F(c) for c in cands])
    best = np.argmin(vals, axis=0)
    u_hi = cands[best, np.arange(u.size)]
    c_hi = vals[best, np.arange(u.size)]
    d_hi = np.arccos(np.clip(c_hi, -1.0, 1.0))
    d_lo = np.full(u.size, 2 * math.pi / p)
    return d_lo, d_hi, u_hi


def lens_observer(u) -> np.ndarray:
    """The observer quaternion with |z1|^2 = u: (sqrt(u), 0, sqrt(1 - u), 0)."""
    u = float(np.clip(u, 0.0, 1.0))
    return np.array([math.sqrt(u), 0.0, math.sqrt(1.0 - u), 0.0])


def observer_images(mats, x0):
    """Image distances d (R) and circle-pair centre separations (deg) seen from x0, one per element."""
    x0 = np.asarray(x0, float)
    gx = mats @ x0
    gix = np.transpose(mats, (0, 2, 1)) @ x0        # g^-1 = g^T (orthogonal)
    c = np.clip(gx @ x0, -1.0, 1.0)
    d = 2.0 * np.arctan2(np.linalg.norm(gx - x0, axis=1), np.linalg.norm(gx + x0, axis=1))
    v = gx - c[:, None] * x0
    w = gix - c[:, None] * x0
    nv, nw = np.linalg.norm(v, axis=1), np.linalg.norm(w, axis=1)
    cs = np.einsum("ij,ij->i", v, w) / np.maximum(nv * nw, 1e-300)
    sep = np.degrees(np.arccos(np.clip(cs, -1.0, 1.0)))
    return d, sep


def evaluate_observer(mats, x0, chi_over_r, coverage, antipodal_tol_deg=1.0) -> dict:
    """Nearest image, largest circle and verdict for one observer of one space."""
    d, sep = observer_images(mats, x0)
    alpha = geometry.circle_radius_deg(d / chi_over_r, chi_over_r)
    d0 = float(np.min(d))
    near = d <= d0 * (1 + 1e-9) + _EPS
    seen = coverage.sees(alpha, sep)
    sep_max = float(np.max(sep[near]))
    return dict(nearest_r=d0, alpha_max_deg=float(np.nanmax(alpha)) if np.any(np.isfinite(alpha)) else math.nan,
                separation_deg=sep_max, back_to_back=bool(sep_max >= 180.0 - antipodal_tol_deg - 1e-9),
                excluded=bool(np.any(seen)))


# --------------------------------------------------------------------------- one space
def evaluate_space(name, chi_over_r, coverage, antipodal_tol_deg=1.0, observers=OBSERVERS) -> dict:
    """One spherical space at one curvature: nearest-image range over observers, largest circles, verdicts.

    ``excluded``: every observer sees a pair the coverage covers; ``excluded_some``: some observer does.
    """
    k = float(chi_over_r)
    d_crit = critical_distance(coverage.radius_lo, k)
    t = S.check_name(name)
    homog = is_homogeneous(name)
    if homog:
        d_lo = d_hi = clifford_distance(name)
        u_hi = 1.0
    else:
        d_lo, d_hi, u_hi = _lens_range_all(t[1])[t[2]]
    a_lo = float(geometry.circle_radius_deg(d_lo / k, k))      # the largest circle any observer sees
    a_hi = float(geometry.circle_radius_deg(d_hi / k, k))      # the largest circle of the worst-placed observer
    row = dict(space=name.replace(" ", ""), family=_family_of(t), order=_order_of(t), homogeneous=homog,
               chi_over_r=k, d_crit_r=d_crit, nearest_min_r=d_lo, nearest_max_r=d_hi, observer_u=u_hi,
               alpha_largest_deg=a_lo, alpha_worst_deg=a_hi)
    if coverage.kind == "general":
        row["excluded"] = bool(d_hi <= d_crit * (1 + 1e-12)) and coverage.radius_lo <= 90.0
        row["excluded_some"] = bool(d_lo <= d_crit * (1 + 1e-12))
        row["sampled_observers"] = 0
        return row
    mats = group_matrices(name)
    us = [1.0] if homog else sorted(set(np.linspace(0.0, 1.0, observers).tolist() + [u_hi]))
    verdicts = [evaluate_observer(mats, lens_observer(u), k, coverage, antipodal_tol_deg)["excluded"] for u in us]
    row["excluded"] = bool(all(verdicts))
    row["excluded_some"] = bool(any(verdicts))
    row["sampled_observers"] = 0 if homog else len(us)
    return row


def _family_of(t):
    if t[0] == "L":
        return "L(p,1)" if t[2] in (1, t[1] - 1) else "L(p,q)"
    return "D*4n" if t[0] == "D*" else t[0]


def _order_of(t):
    return {"L": lambda: t[1], "D*": lambda: t[1], "T*": lambda: 24, "O*": lambda: 48, "I*": lambda: 120}[t[0]]()


# --------------------------------------------------------------------------- families
def check_family(item):
    """Raise ValueError unless ``item`` is a family keyword or a valid spherical space name."""
    if item in FAMILIES:
        return item
    S.check_name(item)
    return item


def family_names(family, p_max):
    """The spaces of a family up to order p_max: L(p,1) for p <= p_max; L(p,q) with 1 < q < p - 1 and q at
    most its class representative (q <= p/2 and q <= q^-1 mod p, the other members being isometric);
    D*4n for 2 <= n <= p_max; or the named space itself."""
    if family == "L(p,1)":
        return [f"L({p},1)" for p in range(2, p_max + 1)]
    if family == "L(p,q)":
        out = []
        for p in range(5, p_max + 1):
            for q in range(2, p - 1):
                if math.gcd(p, q) != 1:
                    continue
                qi = pow(q, -1, p)
                if q == min(q, p - q, qi, p - qi):
                    out.append(f"L({p},{q})")
        return out
    if family == "D*4n":
        return [f"D*{4 * n}" for n in range(2, p_max + 1)]
    return [family.replace(" ", "")]


def spherical_rows(families, omega_ks, coverage, cosmo=None, p_max=40, antipodal_tol_deg=1.0, progress=None):
    """One row per (space, Omega_k), with the curvature's chi/R, R (Gpc) and d_crit."""
    names = list(dict.fromkeys(n for f in families for n in family_names(f, p_max)))
    rows = []
    for ok in omega_ks:
        k = chi_over_r_at(ok, cosmo)
        R = curvature_radius_gpc_at(ok, cosmo)
        it = progress(names, desc=f"omega_k {ok:g}", unit="space") if progress else names
        for name in it:
            r = evaluate_space(name, k, coverage, antipodal_tol_deg)
            r.update(omega_k=float(ok), curvature_radius_gpc=R, nearest_max_gpc=r["nearest_max_r"] * R)
            rows.append(r)
    return rows


def summary_rows(rows, p_max):
    """Per Omega_k: the largest allowed p of L(p,1) and of any L(p,q) (and its q), the largest allowed n of
    D*4n, and whether T*, O*, I* are excluded (every observer).  0 means none allowed; a value equal to
    p_max means the range tabulated ends before the bound."""
    out = []
    for ok in dict.fromkeys(r["omega_k"] for r in rows):
        sub = [r for r in rows if r["omega_k"] == ok]
        first = sub[0]
        s = dict(omega_k=ok, chi_over_r=first["chi_over_r"], curvature_radius_gpc=first["curvature_radius_gpc"],
                 d_crit_r=first["d_crit_r"], d_crit_gpc=first["d_crit_r"] * first["curvature_radius_gpc"],
                 p_max_tabulated=int(p_max))

        def allowed(r):
            return not r["excluded"]

        lp1 = [r["order"] for r in sub if r["family"] == "L(p,1)" and r["space"].endswith(",1)") and allowed(r)]
        s["lens_p1_allowed_max"] = max(lp1) if lp1 else 0
        lens = [r for r in sub if r["family"] in ("L(p,1)", "L(p,q)") and allowed(r)]
        pmax = max((r["order"] for r in lens), default=0)
        s["lens_allowed_max"] = pmax
        qs = sorted(int(r["space"].split(",")[1].rstrip(")")) for r in lens if r["order"] == pmax)
        s["lens_allowed_q"] = " ".join(str(q) for q in qs)
        pr = [r["order"] // 4 for r in sub if r["family"] == "D*4n" and allowed(r)]
        s["prism_n_allowed_max"] = max(pr) if pr else 0
        for name in ("T*", "O*", "I*"):
            hit = [r for r in sub if r["space"] == name]
            s[f"{name[0]}_star_excluded"] = ("yes" if hit[0]["excluded"] else "no") if hit else "-"
        out.append(s)
    return out


ROW_COLUMNS = ("space", "family", "order", "homogeneous", "omega_k", "chi_over_r", "curvature_radius_gpc",
               "d_crit_r", "nearest_min_r", "nearest_max_r", "nearest_max_gpc", "observer_u", "alpha_largest_deg",
               "alpha_worst_deg", "excluded_some", "excluded", "sampled_observers")
SUMMARY_COLUMNS = ("omega_k", "chi_over_r", "curvature_radius_gpc", "d_crit_r", "d_crit_gpc", "p_max_tabulated",
                   "lens_p1_allowed_max", "lens_allowed_max", "lens_allowed_q", "prism_n_allowed_max",
                   "T_star_excluded", "O_star_excluded", "I_star_excluded")


def _table(rows, names):
    from astropy.table import Table

    t = Table(rows=[[r[c] for c in names] for r in rows], names=names) if rows else Table(names=names)
    for c in t.colnames:
        if c.endswith("_deg"):
            t[c].unit = "deg"
            t[c].info.format = ".4f"
        elif c.endswith("_r") or c in ("chi_over_r", "observer_u"):
            t[c].info.format = ".6f"
        elif c.endswith("_gpc"):
            t[c].unit = "Gpc"
            t[c].info.format = ".4f"
    return t


def rows_table(rows):
    return _table(rows, ROW_COLUMNS)


def summary_table(srows):
    return _table(srows, SUMMARY_COLUMNS)


# --------------------------------------------------------------------------- the stage
def wants_spherical(cfg) -> bool:
    """Whether the exclude stage should cover spherical spaces: exclude.spherical listed, or a spherical
    topology.space with no flat exclude.spaces."""
    return bool(cfg.exclude.spherical) or (S.is_spherical_name(cfg.topology.space) and not cfg.exclude.spaces)


def families_for(cfg):
    return list(cfg.exclude.spherical) or [cfg.topology.space]


def omega_ks_for(cfg):
    """exclude.omega_k, else the configured cosmology.omega_k (which must then be negative)."""
    if cfg.exclude.omega_k:
        return [float(x) for x in cfg.exclude.omega_k]
    ok = float(cfg.cosmology.omega_k)
    if ok >= 0.0:
        raise InputError(f"{cfg.source}: exclude.omega_k: found [] with cosmology.omega_k {ok:g}; allowed: a list of "
                         "negative curvatures (e.g. [-0.05, -0.02]) for the spherical spaces")
    return [ok]


def check_spherical(cfg):
    """Checks that need no work (before any output is written)."""
    for f in families_for(cfg):
        try:
            check_family(f)
        except S.SphericalParamError:
            raise InputError(f"{cfg.source}: exclude.spherical: found {f!r}; allowed: {FAMILY_TEXT}")
    if cfg.exclude.points:
        raise InputError(f"{cfg.source}: exclude.points: found {cfg.exclude.points!r} with spherical spaces; allowed: "
                         "null (spherical spaces have no free lengths: their size comes from exclude.omega_k)")
    omega_ks_for(cfg)


def spherical_exclude_run(cfg, run, a_min, a_src, cov):
    """The spherical part of the exclude stage: writes both tables, returns summary lines."""
    from .results import provenance, write_table

    check_spherical(cfg)
    ex = cfg.exclude
    oks = omega_ks_for(cfg)
    fams = families_for(cfg)
    rows = spherical_rows(fams, oks, cov, cfg.cosmology, ex.p_max, ex.antipodal_tol_deg, progress=run.progress)
    srows = summary_rows(rows, ex.p_max)
    meta = provenance(cfg, None, "exclude")
    meta.update(alpha_min_deg=a_min, alpha_min_source=a_src, coverage=cov.kind,
                coverage_radius_deg=[cov.radius_lo, cov.radius_hi], coverage_separation_deg=[cov.sep_lo, cov.sep_hi],
                families=fams, omega_k=oks, p_max=ex.p_max,
                rule="excluded: every observer sees a circle pair of radius >= alpha_min (cos alpha = tan(d/2) / "
                     "tan(chi/R)) within the coverage; excluded_some: some observer does",
                observers="homogeneous spaces: any observer; L(p,q), q != +-1: exact observer range for general "
                          f"coverage, else {OBSERVERS} observers u = |z1|^2 in [0, 1] plus the worst-placed one",
                background="chi/R from astropy LambdaCDM with the cosmology section's other parameters")
    write_table(rows_table(rows), run.dir / EXCLUSION_SPHERICAL, meta)
    write_table(summary_table(srows), run.dir / SUMMARY_SPHERICAL,
                dict(meta, what="per omega_k: largest allowed p (L(p,1); any L(p,q) at its worst-placed observer), "
                     "largest allowed n of D*4n, verdicts on T*, O*, I*"))
    lines = [f"spherical exclusion: {len(rows)} rows, {sum(r['excluded'] for r in rows)} excluded (alpha_min "
             f"{a_min:.2f} deg from {a_src}, coverage {cov.kind}) -> {EXCLUSION_SPHERICAL}"]
    for s in srows:
        lines.append(f"omega_k {s['omega_k']:g} (chi/R {s['chi_over_r']:.4f}): L(p,1) allowed up to p = "
                     f"{s['lens_p1_allowed_max']}, L(p,q) up to p = {s['lens_allowed_max']} (q {s['lens_allowed_q']}), "
                     f"D*4n up to n = {s['prism_n_allowed_max']}; T* {s['T_star_excluded']}, O* "
                     f"{s['O_star_excluded']}, I* {s['I_star_excluded']} excluded")
    return lines
