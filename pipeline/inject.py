"""Injection-recovery campaigns: would a real topology have been seen?

A campaign takes the configured space (``topology``: its family, shape,
angles and observer) and rescales it to a grid of sizes; for every size it
makes ``inject.realizations`` skies of that space, each with the data's noise
level (``inject.noise_uk_arcmin``), the data mask and the data's ``prepare``
section, and asks whether the search finds the predicted circle pairs above
the calibrated threshold.

Size and radius
    The size of a space is the length of its first generator in units of the
    last-scattering distance chi (the side L of a cubic three-torus); all other
    lengths and the observer keep their proportions from ``topology``.  Every
    distance |g x0 - x0| scales with the size, so the largest circle radius the
    search can see obeys cos(alpha) = size d1 / 2, d1 the smallest such distance
    at size 1 (cubic torus: d1 = 1, cos(alpha) = L / 2; Cornish, Spergel &
    Starkman 1998).  ``inject.sizes`` gives the sizes; otherwise
    ``inject.radii_deg`` gives the radii and size = 2 cos(alpha) / d1.

Spherical spaces (L(p,q), D*4n, T*, O*, I*)
    The size is the curvature radius in units of chi, size = R / chi (chi / R =
    1 / size; twinring.topology.spherical.SphericalShape): image distances in chi
    scale with it, d1 is the nearest visible image distance in R and the radius
    obeys cos(alpha) = tan(d1 / 2) / tan(1 / size).  ``inject.omega_k`` lists
    curvatures instead (one size each, chi / R from the background).  Skies are
    Gamma-invariant Sachs-Wolfe skies (twinring.topology.skies_spherical; the
    curvature radius in Mpc is chi times the size, for the spectral tilt), so
    ``inject.physics`` must be ``sw``.  ``bound`` turns alpha_min of such a campaign
    into chi/R < arctan(tan(d1 / 2) / cos(alpha_min)) and the matching Omega_k
    (twinring.bound.spherical_limits).

Visible pairs
    Only predicted pairs the configured search family can see count: back-to-back
    pairs (separation >= 179.5 deg) for ``antipodal``, pairs with a separation
    in ``search.separation_deg`` for ``general``, all pairs for ``listed``.
    The campaign's radius for a size is the largest visible radius; the pairs
    within 0.5 deg of it are the targets.

Detection (``inject.mode``)
    ``targeted``: the pairs of the search's own centre grid nearest to each
    target (the grid centre nearest to circle 1 and its 8 neighbours, each with
    its antipode for ``antipodal``; 9 x 9 combinations with the centres near
    circle 2 for ``general``; the exact predicted centres for ``listed``) are
    scanned at the calibrated grid radii within ``radius_tol_deg`` of the
    predicted radius (all twists, the predicted sense); detected when the best
    of them reaches the threshold at some radius.  These are the grid pairs a
    full search would find the circles with, so the verdict matches a full
    search's at a fraction of the cost (it ignores false matches elsewhere,
    which a detection claim would not count either).
    ``full``: the full search of the config (grid, family, all radii; no
    refinement); detected when a kept pair with the predicted sense, both
    centres within ``centre_tol_deg`` of a target's (0: 2.5 centre-grid steps)
    and a radius within ``radius_tol_deg`` reaches the threshold at its radius.
    Thresholds are the calibration's at ``inject.false_alarm`` (unset:
    ``calibrate.significance``): global (the look-elsewhere-corrected level of
    twinring.calibrate) or local; a rate the calibration's N simulations cannot
    resolve (N < 1/rate - 1) is refused before any work.

Physics (``inject.physics``): ``full`` by default (CAMB transfer functions:
Sachs-Wolfe, integrated Sachs-Wolfe and Doppler terms, which differ between the
two views of a circle and lower S); ``sw`` (Sachs-Wolfe only) on request, and
then labelled in every output as idealised.

Recovered fractions carry the two-sided 95 % Clopper-Pearson interval
(``ci_low``, ``ci_high``) and the one-sided 95 % lower limit ``lower_95`` that
``bound`` requires by default.

Instrument: white noise of ``inject.noise_uk_arcmin`` and a Gaussian beam of
``inject.beam_fwhm_deg`` (the instrument's, applied before ``prepare`` adds its
own); unset, both follow the ``sky`` section when the config makes a synthetic
sky, else 0.  For real data set them to the data's noise and beam.

Orientation: with ``random_orientation`` each sky turns the space by a random
rotation (Haar measure on z-y-z Euler angles), so the campaign averages over
where the circles fall on the centre grid.

Random numbers: sky (size i, realisation j) draws from ``SeedSequence(
inject.seed, spawn_key=(i, j))`` spawned into (orientation, modes, noise).
"""
from __future__ import annotations

import dataclasses
import hashlib
import math
from dataclasses import dataclass

import numpy as np
import healpy as hp
import scipy.stats
from astropy.table import Table

from . import prepare as prep_mod
from . import rings
from .calibrate import grid_peaks, noise_sigma_pixel
from .config import InputError
from .filters import filter_id, filter_window, run_filter
from .significance import lower_limit
from .skymap import SkyMap

RECOVERY = "recovery.ecsv"
INJECTIONS = "injections.ecsv"
BACK_TO_BACK_MIN_DEG = 179.5
SAME_RADIUS_DEG = 0.5
CONFIDENCE = 0.95


# --------------------------------------------------------------------------- geometry of the campaign
@dataclass(frozen=True)
class SpaceShape:
    """The configured space at size 1 (first length = 1 chi); plain values only."""
    name: str
    lengths: tuple          # proportions, first = 1
    angles_deg: tuple | None
    observer: tuple         # in units of the first length
    euler_deg: tuple

    def at(self, size, euler_deg=None):
        from .topology.manifolds import build_space

        return build_space(self.name, self.lengths, self.angles_deg, self.observer,
                           self.euler_deg if euler_deg is None else euler_deg, scale=float(size))


def is_spherical_shape(shape) -> bool:
    return getattr(shape, "geometry", "flat") == "spherical"


def shape_from_config(cfg) -> SpaceShape:
    t = cfg.topology
    from .topology.spherical import is_spherical_name, shape_from_topology

    if is_spherical_name(t.space):               # size = R / chi (twinring.topology.spherical.SphericalShape)
        return shape_from_topology(t)
    if not t.lengths:
        raise InputError(f"{cfg.source}: topology.space: found {t.space!r}; allowed: a space with lengths "
                         "(E1-E17) for an injection campaign")
    L0 = float(t.lengths[0])
    return SpaceShape(t.space, tuple(float(x) / L0 for x in t.lengths),
                      None if t.angles_deg is None else tuple(t.angles_deg),
                      tuple(float(x) / L0 for x in t.observer), tuple(t.euler_deg))


def visible(pairs, scfg):
    """The predicted pairs (list of dicts) that the configured search family can see."""
    if scfg.family == "antipodal":
        return [p for p in pairs if p["separation_deg"] >= BACK_TO_BACK_MIN_DEG]
    if scfg.family == "general":
        lo, hi = scfg.separation_deg
        return [p for p in pairs if lo <= p["separation_deg"] <= hi]
    return list(pairs)


def targets(space, scfg):
    """(radius_deg, target pairs) of a space: the largest visible circles; (nan, []) when none."""
    from .topology.circles import predict_pairs
    from .topology.geometry import SPHERICAL, kind_of

    if kind_of(space) == SPHERICAL:
        from .topology.spherical import predict_pairs as spherical_pairs

        vis = visible(spherical_pairs(space), scfg)
    else:
        vis = visible(predict_pairs(space, max_distance=2.0 - 1e-9), scfg)   # a circle needs d < 2 strictly
    if not vis:
        return float("nan"), []
    r = max(p["radius_deg"] for p in vis)
    return r, [p for p in vis if p["radius_deg"] >= r - SAME_RADIUS_DEG]


def distance_per_size(shape: SpaceShape, scfg) -> float:
    """d1: the smallest |g x0 - x0| of a visible pair for the space at size 1."""
    from .topology.circles import predict_pairs

    if is_spherical_shape(shape):
        d1 = shape.distance_per_size(lambda pairs: visible(pairs, scfg))
        if math.isfinite(d1):
            return d1
        raise InputError(f"topology.space: {shape.name} shows no circle pair the {scfg.family} search family can "
                         "see; allowed: another search.family or space")
    for scale in (0.5, 0.25, 0.125, 0.0625):
        vis = visible(predict_pairs(shape.at(scale), max_distance=2.0 - 1e-9), scfg)
        if vis:
            return min(p["distance"] for p in vis) / scale
    raise InputError(f"topology.space: {shape.name} shows no circle pair the {scfg.family} search family can see; "
                     "allowed: another search.family or space")


def campaign_sizes(cfg, shape, scfg):
    """Sizes (chi) of the campaign and d1; refuses sizes whose largest circle the search cannot see."""
    d1 = distance_per_size(shape, scfg)
    if cfg.inject.omega_k and not is_spherical_shape(shape):
        raise InputError(f"{cfg.source or '<config>'}: inject.omega_k: found {list(cfg.inject.omega_k)} for the flat "
                         f"space {shape.name}; allowed: [] (curvatures size only spherical spaces)")
    if cfg.inject.omega_k:
        from .cosmology import chi_over_r_at

        sizes = tuple(1.0 / chi_over_r_at(ok, cfg.cosmology) for ok in cfg.inject.omega_k)
    elif cfg.inject.sizes:
        sizes = tuple(float(s) for s in cfg.inject.sizes)
    elif is_spherical_shape(shape):
        sizes = tuple(float(shape.size_for_radius(r, d1)) for r in cfg.inject.radii_deg)
    else:
        sizes = tuple(2.0 * math.cos(math.radians(r)) / d1 for r in cfg.inject.radii_deg)
    check_visible(cfg, sizes, d1, scfg, shape)
    return sizes, d1


def visible_radius(size, d1):
    """Largest circle radius (deg) of a space of this size, NaN when its images lie beyond 2 chi (CSS 1998)."""
    c = float(size) * float(d1) / 2.0
    return math.degrees(math.acos(c)) if c < 1.0 else float("nan")


def check_visible(cfg, sizes, d1, scfg, shape=None):
    """Every campaign size must show a circle inside the searched radii (within inject.radius_tol_deg)."""
    radii = np.asarray(scfg.radii_deg(), float)
    lo, hi = radii.min() - cfg.inject.radius_tol_deg, radii.max() + cfg.inject.radius_tol_deg
    bad = []
    spherical = is_spherical_shape(shape)
    for size in sizes:
        r = shape.radius_deg(size, d1) if spherical else visible_radius(size, d1)
        if not (np.isfinite(r) and lo <= r <= hi):
            bad.append(f"{size:.4g} chi ({'no circle' if not np.isfinite(r) else f'radius {r:.1f} deg'})")
    if bad and spherical:
        key = ("inject.omega_k" if cfg.inject.omega_k else "inject.sizes" if cfg.inject.sizes else
               "inject.radii_deg")
        raise InputError(f"{cfg.source or '<config>'}: {key}: campaign size(s) {', '.join(bad)} show no circle inside "
                         f"the searched radii {radii.min():g}-{radii.max():g} deg; allowed: sizes R/chi above "
                         f"{2.0 / math.pi:.4g} whose radius arccos(tan({d1:.4g}/2) / tan(1/size)) lies in that range")
    if bad:
        key = "inject.sizes" if cfg.inject.sizes else "inject.radii_deg"
        raise InputError(f"{cfg.source or '<config>'}: {key}: campaign size(s) {', '.join(bad)} show no circle inside "
                         f"the searched radii {radii.min():g}-{radii.max():g} deg; allowed: sizes below "
                         f"{2.0 / d1:.4g} chi whose radius arccos(size x {d1:.4g} / 2) lies in that range")


def size_for_radius(radius_deg, d1):
    return 2.0 * np.cos(np.radians(radius_deg)) / d1


def random_euler(rng):
    """Euler angles (z-y-z, degrees) of a uniformly random rotation."""
    a, c = rng.uniform(0.0, 360.0, 2)
    b = math.degrees(math.acos(rng.uniform(-1.0, 1.0)))
    return (float(a), float(b), float(c))


# --------------------------------------------------------------------------- one injected sky
@dataclass(frozen=True)
class InjectContext:
    shape: SpaceShape
    sizes: tuple
    random_orientation: bool
    recipe: object                 # twinring.topology.skies.SkyRecipe (lmax = prepare.lmax, no beam)
    beam_fwhm_deg: float           # instrument beam applied before the data's processing
    cosmo: object
    nside: int
    mask: np.ndarray | None
    noise_sigma: float
    prep: object
    search: object
    mode: str
    radius_tol_deg: float
    centre_tol_deg: float
    radii: np.ndarray              # calibrated grid radii
    thresholds: np.ndarray         # (R, 2) S thresholds
    seed: int
    key: str = ""
    filt: np.ndarray | None = None  # prepare's multipole filter, computed once (filters.filter_window)
    ring_filter: np.ndarray | None = None  # the optimal filter's ring weights (filters.run_filter), computed once


def unit_rngs(seed, isize, irep):
    ss = np.random.SeedSequence(int(seed), spawn_key=(int(isize), int(irep)))
    return [np.random.default_rng(s) for s in ss.spawn(3)]


def injected_sky(ctx: InjectContext, isize, irep):
    """(space, SkyMap) of sky (isize, irep): the space's field, white noise, the data mask."""
    from .topology.skies import sky_alm

    r_orient, r_modes, r_noise = unit_rngs(ctx.seed, isize, irep)
    euler = random_euler(r_orient) if ctx.random_orientation else None
    space = ctx.shape.at(ctx.sizes[isize], euler)
    if is_spherical_shape(ctx.shape):
        alm = spherical_sky_alm(space, ctx.recipe, ctx.cosmo, r_modes)
    else:
        alm = sky_alm(space, ctx.recipe, cosmo=ctx.cosmo, nthreads=1, rng=r_modes)
    if ctx.beam_fwhm_deg > 0:
        alm = hp.almxfl(alm, hp.gauss_beam(math.radians(ctx.beam_fwhm_deg), lmax=ctx.recipe.lmax))
    m = hp.alm2map(alm, ctx.nside, lmax=ctx.recipe.lmax, mmax=ctx.recipe.lmax, pixwin=False)
    sigma = np.asarray(ctx.noise_sigma, float)     # white (a number) or per pixel (calibrate.noise_variance_map)
    if np.any(sigma > 0):
        m = m + sigma * r_noise.standard_normal(m.size)
    mask = np.ones(m.size) if ctx.mask is None else np.asarray(ctx.mask, float)
    sky = SkyMap(values=m * mask, mask=mask, nside=int(ctx.nside), unit_in="uK", frame=None, checksum="",
                 notes=[], path=f"injection {isize}/{irep}")
    return space, sky


def spherical_sky_alm(space, recipe, cosmo, rng):
    """Unbeamed Sachs-Wolfe a_lm (uK) of a spherical space (twinring.topology.skies_spherical); the curvature
    radius is chi (the configured background) times the campaign size, l < recipe.lmin zeroed."""
    from . import cosmology
    from .topology.skies_spherical import sw_alm

    p = cosmology._params(cosmo)
    r_mpc = cosmology.chi_ls_gpc(cosmo) * 1000.0 / space.chi_over_r
    alm, _ = sw_alm(space, recipe.lmax, rng, cosmology.t0_uk(cosmo), r_mpc, p[7], p[8], p[9],
                    recipe.kmax_factor or 1.0, nthreads=1)
    alm[hp.Alm.getlm(recipe.lmax)[0] < recipe.lmin] = 0.0
    return alm


def _window(ctx, radius):
    idx = np.flatnonzero(np.abs(ctx.radii - radius) <= ctx.radius_tol_deg + 1e-9)
    if idx.size == 0 and ctx.radii.size and ctx.radii.min() - 1e-9 <= radius <= ctx.radii.max() + 1e-9:
        idx = np.array([int(np.argmin(np.abs(ctx.radii - radius)))])
    return idx


def _near(nside, v):
    """Grid centres (RING indices) nearest to ``v``: its pixel and the 8 neighbours."""
    pix = int(hp.vec2pix(nside, *np.asarray(v, float)))
    nb = hp.get_all_neighbours(nside, pix)
    return np.unique(np.concatenate([[pix], nb[nb >= 0]]))


def grid_pairs(pairs, scfg) -> Table:
    """The pairs of the search's own grid nearest to the predicted pairs (listed pairs as they are).

    ``antipodal``: each centre near circle 1 with its antipode; ``general``: every
    centre near circle 1 with every centre near circle 2 (9 x 9); ``listed``: the
    predicted centres themselves.
    """
    names = ["lon1_deg", "lat1_deg", "lon2_deg", "lat2_deg"]
    if scfg.family == "listed":
        return Table(rows=[(p["lon1_deg"], p["lat1_deg"], p["lon2_deg"], p["lat2_deg"]) for p in pairs], names=names)
    nside = int(scfg.nside_centers)
    centres = rings.center_grid(nside)
    anti = rings.antipode_index(nside) if scfg.family == "antipodal" else None
    rows = set()
    for p in pairs:
        a = rings.lonlat_to_vec(p["lon1_deg"], p["lat1_deg"])
        b = rings.lonlat_to_vec(p["lon2_deg"], p["lat2_deg"])
        if anti is not None:
            rows.update((int(i), int(anti[i])) for i in _near(nside, a))
        else:
            rows.update((int(i), int(j)) for i in _near(nside, a) for j in _near(nside, b) if i != j)
    rows = sorted(rows)
    lon1, lat1 = rings.vec_to_lonlat(centres[[r[0] for r in rows]])
    lon2, lat2 = rings.vec_to_lonlat(centres[[r[1] for r in rows]])
    return Table([lon1, lat1, lon2, lat2], names=names)


def judge_targeted(ctx, prepared, pairs, radius, key):
    idx = _window(ctx, radius)
    if idx.size == 0:
        return None
    step = float(np.median(np.diff(ctx.radii))) if ctx.radii.size > 1 else 1.0
    scfg = dataclasses.replace(ctx.search, family="listed", radius_deg=(float(ctx.radii[idx[0]]),
                               float(ctx.radii[idx[-1]]), step))
    plan, pool = grid_peaks(prepared, scfg, grid_pairs(pairs, ctx.search), key=key, ring_filter=ctx.ring_filter)
    best = None
    for f in sorted({int(p["flip"]) for p in pairs}):
        for q, ir in enumerate(idx):
            s = float(pool.peak_s[q, f])
            thr = float(ctx.thresholds[ir, f])
            if np.isfinite(s) and (best is None or s - thr > best[0] - best[1]):
                best = (s, thr, float(ctx.radii[ir]))
    return best


def judge_full(ctx, prepared, pairs, radius, key):
    if _window(ctx, radius).size == 0:
        return None
    plan, pool = grid_peaks(prepared, ctx.search, None, key=key, ring_filter=ctx.ring_filter)
    tol = ctx.centre_tol_deg or 2.5 * plan.grid_deg
    cos_tol = math.cos(math.radians(tol))
    c1, c2 = plan.centres[pool.i], plan.centres[pool.j]
    rad = np.asarray(plan.radii_deg)[pool.radius_index] if pool.s.size else np.zeros(0)
    best = None
    for p in pairs:
        a = rings.lonlat_to_vec(p["lon1_deg"], p["lat1_deg"])
        b = rings.lonlat_to_vec(p["lon2_deg"], p["lat2_deg"])
        near = ((c1 @ a >= cos_tol) & (c2 @ b >= cos_tol)) | ((c1 @ b >= cos_tol) & (c2 @ a >= cos_tol))
        sel = np.flatnonzero(near & (pool.sense == int(p["flip"])) & (np.abs(rad - p["radius_deg"]) <= ctx.radius_tol_deg + 1e-9))
        for e in sel:
            ir = int(np.argmin(np.abs(ctx.radii - rad[e])))
            s, thr = float(pool.s[e]), float(ctx.thresholds[ir, int(p["flip"])])
            if best is None or s - thr > best[0] - best[1]:
                best = (s, thr, float(rad[e]))
    if best is None:
        # nothing kept near the targets: report the best grid S in the window for the record
        idx = _window(ctx, radius)
        f = int(pairs[0]["flip"])
        q = int(idx[np.argmax(pool.peak_s[idx, f])])
        best = (-np.inf, float(ctx.thresholds[q, f]), float(ctx.radii[q]))
    return best


def inject_unit(ctx: InjectContext, unit):
    """Work unit (size index, realisation): dict with the verdict on one injected sky."""
    isize, irep = unit
    space, sky = injected_sky(ctx, isize, irep)
    radius, pairs = targets(space, ctx.search)
    out = dict(size_index=int(isize), realization=int(irep), size_chi=float(ctx.sizes[isize]),
               radius_deg=float(radius), n_targets=len(pairs), flip=bool(pairs[0]["flip"]) if pairs else False,
               s=float("nan"), s_threshold=float("nan"), radius_found_deg=float("nan"), in_range=False,
               detected=False)
    if not pairs:
        return out
    prepared = prep_mod.prepare_map(sky, ctx.prep, filt=ctx.filt)
    judge = judge_targeted if ctx.mode == "targeted" else judge_full
    best = judge(ctx, prepared, pairs, radius, key=f"{ctx.key}-inj{isize}-{irep}")
    if best is None:
        return out
    s, thr, r = best
    out.update(s=float(s), s_threshold=float(thr), radius_found_deg=float(r), in_range=True,
               detected=bool(np.isfinite(s) and s >= thr))
    return out


# --------------------------------------------------------------------------- tables
def injections_table(results) -> Table:
    names = ["size_index", "realization", "size_chi", "radius_deg", "n_targets", "flip", "s", "s_threshold",
             "radius_found_deg", "in_range", "detected"]
    dtypes = [int, int, float, float, int, bool, float, float, float, bool, bool]
    rows = [[r[n] for n in names] for r in results]
    t = Table(rows=rows, names=names, dtype=dtypes) if rows else Table(names=names, dtype=dtypes)
    for c in ("size_chi", "radius_deg", "s", "s_threshold", "radius_found_deg"):
        t[c].info.format = ".5f"
    return t


def add_expected_s(rec: Table, cfg, ctx) -> None:
    """Column ``s_expected`` of a recovery table: the model's expected S of a true pair at each radius
    (twinring.filters.expected_pair_s), beside the measured ``s_mean``."""
    from .filters import expected_pair_s

    noise = instrument(cfg)[0]
    rec["s_expected"] = np.array([expected_pair_s(cfg, float(r), ctx.recipe.physics, noise, ctx.ring_filter)
                                  for r in rec["radius_deg"]], float)
    rec["s_expected"].info.format = ".4f"


def binomial_interval(k, n, confidence=CONFIDENCE):
    """Clopper-Pearson interval of a binomial proportion (scipy.stats.binomtest)."""
    if n == 0:
        return float("nan"), float("nan")
    ci = scipy.stats.binomtest(int(k), int(n)).proportion_ci(confidence_level=confidence, method="exact")
    return float(ci.low), float(ci.high)


def recovery_table(inj: Table, confidence=CONFIDENCE) -> Table:
    rows = []
    for isize in sorted(set(int(x) for x in inj["size_index"])):
        sel = inj[inj["size_index"] == isize]
        n = len(sel)
        k = int(np.sum(sel["detected"]))
        lo, hi = binomial_interval(k, n, confidence)
        low1 = float(lower_limit(k, n, confidence)) if n else np.nan
        s = np.asarray(sel["s"], float)
        s = s[np.isfinite(s)]
        rows.append((float(sel["size_chi"][0]), float(np.nanmedian(sel["radius_deg"])), n, k, k / n if n else np.nan,
                     lo, hi, low1, bool(np.all(sel["in_range"])), float(np.median(s)) if s.size else np.nan,
                     float(np.nanmedian(sel["s_threshold"])) if np.any(np.isfinite(sel["s_threshold"])) else np.nan,
                     float(np.mean(s)) if s.size else np.nan))
    names = ["size_chi", "radius_deg", "n", "detected", "fraction", "ci_low", "ci_high", "lower_95", "in_range",
             "s_median", "s_threshold", "s_mean"]
    dtypes = [float, float, int, int, float, float, float, float, bool, float, float, float]
    t = Table(rows=rows, names=names, dtype=dtypes) if rows else Table(names=names, dtype=dtypes)
    t.sort("radius_deg")
    for c in ("size_chi", "radius_deg", "fraction", "ci_low", "ci_high", "lower_95", "s_median", "s_threshold",
              "s_mean"):
        t[c].info.format = ".4f"
    t["radius_deg"].unit = "deg"
    return t


# --------------------------------------------------------------------------- the stage
def instrument(cfg):
    """(noise uK-arcmin, instrument beam FWHM deg) of the injected skies.

    Unset keys take the ``sky`` section's values when the config makes a synthetic
    sky (so injections look like the data), else 0.
    """
    synthetic = "sky" in cfg.present or "topology" in cfg.present
    noise = cfg.inject.noise_uk_arcmin
    beam = cfg.inject.beam_fwhm_deg
    if noise is None:
        noise = cfg.sky.noise_uk_arcmin if synthetic else 0.0
    if beam is None:
        beam = cfg.sky.fwhm_deg if synthetic else 0.0
    return float(noise), float(beam)


def make_context(cfg, sky, model, shape=None, sizes=None) -> InjectContext:
    """The campaign context from the config, the data SkyMap (mask, Nside) and the null model."""
    from .calibrate import sim_nside_for
    from .topology.skies import SkyRecipe

    inj = cfg.inject
    shape = shape or shape_from_config(cfg)
    if sizes is None:
        sizes, _ = campaign_sizes(cfg, shape, cfg.search)
    nside = sim_nside_for(cfg, sky.nside)
    mask = None
    if np.any(sky.mask <= 0.5):
        mask = prep_mod.regrid_mask(sky.mask, nside, keep=0.5) if nside != sky.nside else (sky.mask > 0.5).astype(float)
    physics = inj.physics
    recipe = SkyRecipe(nside=nside, lmax=int(cfg.prepare.lmax), fwhm_deg=0.0, physics=physics, seed=0,
                       noise_uk_arcmin=0.0, lmin=2, kmax_factor=cfg.sky.kmax_factor,
                       open_length=cfg.sky.open_length_chi)
    radii = np.asarray(model.radii, float)
    cal_radii = np.asarray(cfg.search.radii_deg(), float)
    if radii.size != cal_radii.size or not np.allclose(radii, cal_radii, atol=1e-6):
        raise InputError(f"{cfg.source}: search.radius_deg differs from the calibration's radii; "
                         "allowed: rerun `twinring calibrate` with this config")
    rate = injection_rate(cfg, model)
    thr = np.array([[model.threshold(ir, f, rate, inj.threshold) for f in (0, 1)]
                    for ir in range(radii.size)])
    noise, beam = instrument(cfg)
    sigma = noise_sigma_pixel(noise, nside)
    if cfg.calibrate.noise_variance_map and cfg.inject.noise_uk_arcmin is None:
        from .calibrate import noise_for          # the data's per-pixel noise, as in the calibration
        sigma = noise_for(cfg, nside)[0]
    sig_key = float(sigma) if np.ndim(sigma) == 0 else hashlib.sha256(np.ascontiguousarray(sigma).tobytes()).hexdigest()
    h = hashlib.sha256()
    h.update(cfg.section_hash("prepare", "search", "inject", "cosmology").encode())
    h.update(repr((shape, tuple(sizes), recipe, nside, sig_key, beam)).encode())
    h.update(np.ascontiguousarray(thr).tobytes())
    if mask is not None:
        h.update(np.packbits(mask > 0.5).tobytes())
    return InjectContext(shape=shape, sizes=tuple(float(s) for s in sizes), random_orientation=inj.random_orientation,
                         recipe=recipe, beam_fwhm_deg=beam, cosmo=cfg.cosmology, nside=nside, mask=mask, noise_sigma=sigma,
                         prep=cfg.prepare, search=cfg.search, mode=inj.mode, radius_tol_deg=inj.radius_tol_deg,
                         centre_tol_deg=inj.centre_tol_deg, radii=radii, thresholds=thr, seed=int(inj.seed),
                         key=h.hexdigest()[:16], filt=filter_window(cfg.prepare),
                         ring_filter=run_filter(cfg))


def injection_rate(cfg, model):
    """The false-alarm rate of the detection thresholds; refused when the calibration cannot resolve it."""
    from .significance import sims_needed

    rate = cfg.inject.false_alarm if cfg.inject.false_alarm is not None else cfg.calibrate.significance
    if not model.resolvable(rate):
        key = "inject.false_alarm" if cfg.inject.false_alarm is not None else "calibrate.significance"
        raise InputError(f"{cfg.source or '<config>'}: {key}: found {rate:g}, which {model.n_sims} calibration "
                         f"simulations cannot resolve (needs at least {sims_needed(rate)}); allowed: a rate >= "
                         f"1/(N+1) = {model.p_floor:.3g}, or more calibrate.simulations")
    return float(rate)


def physics_label(physics):
    return ("full physics (CAMB: Sachs-Wolfe, ISW, Doppler)" if physics == "full"
            else "Sachs-Wolfe only (idealised: no ISW or Doppler; optimistic sensitivity)")


def check_campaign(cfg, ctx: InjectContext):
    """Parameters that cannot make a sky, before any work."""
    from .topology.skies import SkyParamError, check_sky

    if is_spherical_shape(ctx.shape):
        from .topology.skies_spherical import check_centres

        if ctx.recipe.physics != "sw":
            raise InputError(f"{cfg.source}: inject.physics: found {ctx.recipe.physics!r}; allowed: sw for the "
                             f"spherical space {ctx.shape.name} (Sachs-Wolfe skies only)")
        for size in (min(ctx.sizes), max(ctx.sizes)):
            try:
                check_centres(ctx.shape.at(size), ctx.recipe.lmax, ctx.recipe.kmax_factor or 1.0)
            except Exception as exc:
                raise InputError(f"{cfg.source}: inject.sizes: size {size:.3g} (R/chi) of {ctx.shape.name} rejected "
                                 f"({exc}); allowed: sizes above {2 / math.pi:.4g} and a prepare.lmax the sky "
                                 "sampler can reach")
        return
    for size in (min(ctx.sizes), max(ctx.sizes)):
        try:
            check_sky(ctx.shape.at(size), ctx.recipe, memory_gb=cfg.compute.memory_gb, cosmo=ctx.cosmo)
        except SkyParamError as exc:
            raise InputError(f"{cfg.source}: sky.{exc.key} (campaign size {size:.3g} chi): found {exc.found!r}; "
                             f"allowed: {exc.allowed}")
        except Exception as exc:       # a shape that the space does not allow
            raise InputError(f"{cfg.source}: inject.sizes: size {size:.3g} chi of {ctx.shape.name} rejected "
                             f"({exc}); allowed: sizes that make a valid space")


def inject_run(cfg, run, sky=None):
    """The inject stage on an open run: the campaign, injections.ecsv and recovery.ecsv. Returns summary lines."""
    import time

    from .calibrate import load_data, load_null_model
    from .execute import run_units
    from .results import provenance, write_table
    from .inputs import input_files

    model = load_null_model(run.dir)
    shape = shape_from_config(cfg)
    sizes, d1 = campaign_sizes(cfg, shape, cfg.search)
    if sky is None:
        sky, _ = load_data(cfg)
    ctx = make_context(cfg, sky, model, shape, sizes)
    check_campaign(cfg, ctx)
    units = [(i, j) for i in range(len(sizes)) for j in range(cfg.inject.realizations)]
    rate = injection_rate(cfg, model)
    run.log(f"campaign: {shape.name}, {len(sizes)} sizes x {cfg.inject.realizations} skies, mode {ctx.mode}, "
            f"{physics_label(ctx.recipe.physics)}, {cfg.inject.threshold} threshold at {rate:g} "
            f"({model.n_sims} simulations; setup {ctx.key})")
    t0 = time.time()
    res = run_units(inject_unit, ctx, units, compute=cfg.compute, store_dir=run.dir, tag="inject", key=ctx.key,
                    progress=run.progress, log=run.log)
    dt = time.time() - t0
    inj = injections_table([res[u] for u in units])
    rec = recovery_table(inj)
    add_expected_s(rec, cfg, ctx)
    meta = provenance(cfg, input_files(cfg), "inject")
    meta.update(space=shape.name, shape_lengths=list(shape.lengths), distance_per_size=d1, mode=ctx.mode,
                false_alarm=rate, threshold=cfg.inject.threshold, calibration_n_sims=model.n_sims,
                physics_label=physics_label(ctx.recipe.physics),
                realizations=cfg.inject.realizations, seed=cfg.inject.seed, noise_uk_arcmin=instrument(cfg)[0],
                beam_fwhm_deg=instrument(cfg)[1],
                physics=ctx.recipe.physics, confidence=CONFIDENCE, search_family=cfg.search.family,
                filter=filter_id(cfg.prepare, ctx.ring_filter),
                size_definition=getattr(shape, "size_definition",
                                        "length of the first generator in units of chi (cubic torus: side L)"),
                geometry=getattr(shape, "geometry", "flat"))
    write_table(inj, run.dir / INJECTIONS, meta)
    write_table(rec, run.dir / RECOVERY, meta)
    lines = [f"{len(units)} injected skies in {dt:.1f} s ({dt / max(1, len(units)):.2f} s each); "
             f"{physics_label(ctx.recipe.physics)}"]
    for row in rec:
        lines.append(f"  size {row['size_chi']:.3f} chi, radius {row['radius_deg']:5.1f} deg: "
                     f"{row['detected']}/{row['n']} recovered (95 % interval {row['ci_low']:.2f}-{row['ci_high']:.2f},"
                     f" one-sided 95 % lower limit {row['lower_95']:.2f})")
    return lines


def cmd_inject(args):
    from .rundir import open_run
    from .inputs import load_run_config

    from .calibrate import load_data

    cfg = load_run_config(args)
    shape = shape_from_config(cfg)
    campaign_sizes(cfg, shape, cfg.search)      # bad inputs fail before the output dir is touched
    sky, _ = load_data(cfg)
    run = open_run(cfg, args.out, args.force, "inject")
    run.finish(inject_run(cfg, run, sky))
    return 0
