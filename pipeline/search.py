"""The matched-circle search: pair families, chunked scan, one candidate per physical pair.

The work is split into chunks with stable identities ``(radius index, block
index)``.  :func:`scan_chunk` is a pure function of the plan and the chunk id;
the results of all chunks, combined in chunk-id order by :func:`combine`, do
not depend on how, where or in what order the chunks ran.  :func:`finalize`
pools the best pairs of every radius, suppresses neighbours of stronger
candidates, refines the survivors off the grid (centres, radius, twist) and
returns the candidate and peak tables.

Rings are sampled in the reference phase frame of every centre (the
back-to-back rule of :mod:`twinring.rings`), so one ring set per radius serves
every pair; twists are converted to the pair convention at the end.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import healpy as hp
from astropy.table import Table
import scipy.fft
from scipy.optimize import minimize

from . import rings, screen
from .statistic import m_weights, ring_spectra, scan_pairs, s_curve
from .config import InputError

TARGET_PAIRS_PER_CHUNK = 2_000_000


@dataclass(frozen=True)
class SearchPlan:
    """Everything any chunk needs; small enough to ship to remote workers."""
    alm: np.ndarray
    lmax: int
    mask: np.ndarray | None          # prepared mask (RING, 0/1) or None when nothing is masked
    centres: np.ndarray              # (n, 3) unit vectors
    radii_deg: tuple
    nsamp: tuple                     # samples per ring at each radius
    family: str
    blocks: tuple                    # per block: array of first-circle indices
    partner: np.ndarray | None       # antipodal/listed: second-circle index of each first index
    sep_cos: tuple                   # general: (cos max sep, cos min sep)
    weighting: str
    min_valid_fraction: float
    keep: int                        # best pairs kept per chunk, radius and sense
    threads: int
    grid_deg: float                  # centre spacing, for suppression and refinement
    key: str = ""                    # identity of the plan (for ring caches)
    method: str = "exhaustive"       # general family: 'fast' scans only the screen's survivors (twinring.screen)
    screen_partners: int = 64        # fast: best partners kept per centre and radius
    screen_mmax: int = 0             # fast: highest m of the screen (0 = from the ring power)
    memory_gb: float = 4.0           # fast: memory for the screen's blocked products
    screen_levels: int = 0           # fast: levels of the coarse grid of a coarse-to-fine screen (0: one level)
    screen: dict = field(default_factory=dict)   # fast: what the screen is and its reference survival
    ring_filter: np.ndarray | None = None   # prepare.filter optimal: ring weights per radius (twinring.filters)

    def weights(self, radius_deg, nsamp):
        """The ring weighting at a radius: the optimal filter's weights there, else ``weighting``."""
        if self.ring_filter is None:
            return self.weighting
        from .filters import weights_at

        return weights_at(self.ring_filter, radius_deg, nsamp)

    def chunk_ids(self):
        return [(ir, ib) for ir in range(len(self.radii_deg)) for ib in range(len(self.blocks))]


@dataclass
class ChunkResult:
    """Best pairs of one chunk: arrays of equal length (sorted by s, then ids)."""
    chunk: tuple
    s: np.ndarray
    i: np.ndarray
    j: np.ndarray
    sense: np.ndarray
    k: np.ndarray
    peak_s: np.ndarray = field(default=None)      # (2,) best s per sense in this chunk
    peak_idx: np.ndarray = field(default=None)    # (2, 3): i, j, k of that best
    pairs: int = 0
    moments: np.ndarray = field(default=None)     # (2, 3): count, sum, sum of squares of every pair's S per sense


# --------------------------------------------------------------------------- plan
def centre_spacing_deg(nside):
    return math.degrees(hp.nside2resol(nside))


def make_plan(prepared, scfg, compute=None, listed_table=None, key="", ring_filter=None) -> SearchPlan:
    """Build the search plan from a prepared map and the config's search section.

    ``ring_filter``: the optimal filter's weight table (twinring.filters.run_filter), which then
    replaces ``scfg.weighting`` at every radius."""
    radii = tuple(scfg.radii_deg())
    nsamp = tuple(rings.samples_for(math.radians(r), prepared.lmax, scfg.sample_margin) for r in radii)
    mask = prepared.mask
    if mask is not None and np.all(mask > 0.5):
        mask = None
    smin, smax = scfg.separation_deg
    sep_cos = (math.cos(math.radians(smax)), math.cos(math.radians(smin)))
    partner = None
    if scfg.family == "listed":
        if listed_table is None:
            raise InputError(f"search.listed: no table given; allowed: a table of circle pairs")
        c1 = rings.lonlat_to_vec(np.asarray(listed_table["lon1_deg"], float), np.asarray(listed_table["lat1_deg"], float))
        c2 = rings.lonlat_to_vec(np.asarray(listed_table["lon2_deg"], float), np.asarray(listed_table["lat2_deg"], float))
        centres = np.concatenate([c1, c2])
        first = np.arange(len(c1))
        partner = np.concatenate([np.arange(len(c1)) + len(c1), np.zeros(len(c1), int)])
        grid = 1.0
        per_block = max(1, TARGET_PAIRS_PER_CHUNK)
    else:
        centres = rings.center_grid(scfg.nside_centers)
        grid = centre_spacing_deg(scfg.nside_centers)
        n = centres.shape[0]
        if scfg.family == "antipodal":
            partner = rings.antipode_index(scfg.nside_centers)
            first = np.flatnonzero(np.arange(n) < partner)
            per_block = max(1, TARGET_PAIRS_PER_CHUNK)
        else:
            first = np.arange(n)
            frac = max((sep_cos[1] - sep_cos[0]) / 2, 1e-6)
            per_block = max(1, int(TARGET_PAIRS_PER_CHUNK / max(1.0, n * frac / 2)))
            if scfg.method == "fast":
                per_block = n      # the screen sees all pairs of a radius at once: one chunk per radius
    blocks = tuple(first[lo:lo + per_block] for lo in range(0, first.size, per_block))
    threads = 1 if compute is None else max(1, compute.threads or 1)
    return SearchPlan(
        alm=np.asarray(prepared.alm), lmax=int(prepared.lmax), mask=mask, centres=centres, radii_deg=radii,
        nsamp=nsamp, family=scfg.family, blocks=blocks, partner=partner, sep_cos=sep_cos,
        weighting=scfg.weighting, min_valid_fraction=scfg.min_valid_fraction, keep=scfg.keep_per_radius,
        threads=threads, grid_deg=(scfg.suppress_deg or grid), key=key, ring_filter=ring_filter,
        **_screen_fields(scfg, compute),
    )


def _screen_fields(scfg, compute):
    if scfg.family != "general" or scfg.method != "fast":
        return {}
    partners, levels = scfg.screen_setup()
    return dict(method="fast", screen_partners=partners, screen_mmax=scfg.screen_mmax,
                memory_gb=(compute.memory_gb if compute is not None else 4.0), screen_levels=levels,
                screen=screen.describe(scfg.nside_centers, partners, levels))


def count_pairs(plan: SearchPlan) -> int:
    """Number of circle pairs one radius scans (both senses count once)."""
    return sum(_block_pairs(plan, ib)[0].size for ib in range(len(plan.blocks)))


def _block_pairs(plan: SearchPlan, ib, ir=None):
    """Pairs (i, j) of block ``ib``; with ``ir`` and ``method == 'fast'`` (general family), only the
    pairs that pass the screen at radius index ``ir``."""
    first = plan.blocks[ib]
    if plan.family in ("antipodal", "listed"):
        return first, plan.partner[first]
    if plan.method == "fast" and ir is not None:
        if plan.screen_levels > 0:
            i, j = screen.screen_pairs_hierarchical(
                ring_set(plan, ir), coarse_ring_set(plan, ir), plan.centres, plan.sep_cos, plan.screen_partners,
                plan.screen_levels, plan.min_valid_fraction, plan.screen_mmax, plan.memory_gb, threads=plan.threads)
        else:
            i, j = screen.screen_pairs(ring_set(plan, ir), plan.centres, plan.sep_cos, plan.screen_partners,
                                       plan.min_valid_fraction, plan.screen_mmax, plan.memory_gb,
                                       threads=plan.threads)
        if first.size != plan.centres.shape[0]:
            inb = np.zeros(plan.centres.shape[0], dtype=bool)
            inb[first] = True
            sel = inb[i]
            i, j = i[sel], j[sel]
        return i, j
    c = plan.centres
    lo, hi = plan.sep_cos
    ii, jj = [], []
    for i in first:
        d = c[i + 1:] @ c[i]
        j = np.flatnonzero((d >= lo - 1e-12) & (d <= hi + 1e-12)) + i + 1
        ii.append(np.full(j.size, i, dtype=np.int64))
        jj.append(j)
    if not ii:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    return np.concatenate(ii), np.concatenate(jj)


# --------------------------------------------------------------------------- rings per radius
_RING_CACHE: dict = {}


def _cached_rings(cache, plan: SearchPlan, ir, centres):
    """Spectra of the rings about ``centres`` at radius index ``ir``, kept in ``cache`` for the very same
    plan object (ids of dead objects are reused); one radius at a time per process bounds memory."""
    hit = cache.get(ir)
    if hit is not None and hit[0] is plan:
        return hit[1]
    alpha = math.radians(plan.radii_deg[ir])
    vals, wts = rings.sample_rings(plan.alm, plan.lmax, centres, alpha, plan.nsamp[ir], None, plan.mask,
                                   nthreads=plan.threads)
    spec = ring_spectra(vals, wts, plan.weights(plan.radii_deg[ir], plan.nsamp[ir]))
    cache.clear()
    cache[ir] = (plan, spec)
    return spec


def clear_ring_caches():
    """Forget the kept rings (fine and coarse), e.g. after a simulation's search."""
    _RING_CACHE.clear()
    _COARSE_CACHE.clear()


def ring_set(plan: SearchPlan, ir):
    """Spectra of the rings about every centre at radius index ``ir`` (cached per process)."""
    return _cached_rings(_RING_CACHE, plan, ir, plan.centres)


_COARSE_CACHE: dict = {}


def coarse_ring_set(plan: SearchPlan, ir):
    """Spectra of the rings at radius index ``ir`` about the centres of the grid ``plan.screen_levels``
    HEALPix levels coarser than the plan's (the coarse stage of the screen; cached per process)."""
    nside = hp.npix2nside(plan.centres.shape[0]) >> plan.screen_levels
    return _cached_rings(_COARSE_CACHE, plan, ir, rings.center_grid(nside))


# --------------------------------------------------------------------------- survival of known pairs
def known_pair_ranks(plan, pairs, s_min=0.6, reach=1.6, dim=None, hier_partners=()):
    """Screen ranks of known circle pairs (injected or predicted) on a search plan.

    ``pairs``: iterable of (c1, c2, radius_deg) with unit-vector centres.  For each pair, the exact
    S is evaluated on the grid pairs with both centres within ``reach`` grid spacings of the true
    ones, at the grid radii within one radius step of the true radius; the best grid pair (over
    radii and senses) stands for the pair, as it is the one the exhaustive search reports for it.
    Pairs whose best grid S is below ``s_min`` are not detected by the exhaustive search and are
    left out.  Returns one dict per detected pair: radius_deg (true), ir, i, j, s, sense, rank
    (the better of the two ends; the pair survives a screen keeping K partners when rank < K) and
    the rank of every grid radius where that radius' best grid pair also exceeds ``s_min``
    (``ranks_by_radius``: {ir: rank}).  With ``plan.screen_levels`` > 0, ``hier_rank`` gives for every
    K in ``hier_partners`` (default: the plan's ``screen_partners``) the pair's rank in the coarse-to-fine
    screen keeping K partners at both levels (:func:`twinring.screen.hierarchical_rank`; None when the
    coarse stage drops it), at the best pair's radius: the pair survives that screen when it is not None
    and < K.  (Here rather than in twinring.screen, which then needs nothing from this module.)
    """
    radii = np.asarray(plan.radii_deg)
    step = float(np.min(np.diff(radii))) if radii.size > 1 else 1.0
    nside = hp.npix2nside(plan.centres.shape[0])
    lo, hi = plan.sep_cos
    out = []
    per_radius = {}
    todo = []
    for c1, c2, alpha in pairs:
        c1 = np.asarray(c1, float) / np.linalg.norm(c1)
        c2 = np.asarray(c2, float) / np.linalg.norm(c2)
        irs = np.flatnonzero(np.abs(radii - alpha) <= step + 1e-9)
        if irs.size == 0:
            continue
        a = hp.query_disc(nside, c1, math.radians(reach * plan.grid_deg), inclusive=False)
        b = hp.query_disc(nside, c2, math.radians(reach * plan.grid_deg), inclusive=False)
        ii, jj = np.meshgrid(a, b, indexing="ij")
        ii, jj = np.minimum(ii, jj).ravel(), np.maximum(ii, jj).ravel()
        d = np.sum(plan.centres[ii] * plan.centres[jj], axis=1)
        ok = (ii != jj) & (d >= lo - screen.SEP_TOL) & (d <= hi + screen.SEP_TOL)
        ii, jj = ii[ok], jj[ok]
        if ii.size == 0:
            continue
        todo.append((float(alpha), irs, ii, jj))
        for ir in irs:
            per_radius.setdefault(int(ir), []).append(len(todo) - 1)
    best = [None] * len(todo)
    at_radius = [dict() for _ in todo]
    for ir in sorted(per_radius):
        spec = ring_set(plan, ir)
        use = screen.usable_rings(spec, plan.min_valid_fraction)
        F = None
        for q in per_radius[ir]:
            alpha, irs, ii, jj = todo[q]
            s, _ = scan_pairs(spec, ii, spec, jj, plan.min_valid_fraction)
            sense = int(np.argmax(s.max(axis=1)))
            b = int(np.argmax(s[sense]))
            sb = float(s[sense, b])
            if not sb >= s_min:
                continue
            if F is None:
                F = screen.screen_vectors(spec, use, plan.screen_mmax, dim)
            rank = screen.pair_rank(F, plan.centres, plan.sep_cos, int(ii[b]), int(jj[b]), use)
            at_radius[q][ir] = rank
            if best[q] is None or sb > best[q]["s"]:
                best[q] = dict(radius_deg=alpha, ir=ir, i=int(ii[b]), j=int(jj[b]), s=sb, sense=sense, rank=rank)
    levels = int(getattr(plan, "screen_levels", 0) or 0)
    if levels > 0:
        ks = tuple(hier_partners) or (plan.screen_partners,)
        coarse, parent, cover, radius = screen.coarse_grid(nside, levels)
        for ir in sorted({b["ir"] for b in best if b is not None}):
            spec = ring_set(plan, ir)
            use = screen.usable_rings(spec, plan.min_valid_fraction)
            F = screen.screen_vectors(spec, use, plan.screen_mmax, dim)
            spec_c = coarse_ring_set(plan, ir)
            use_c = screen.coarse_use(use, cover, spec_c)
            Fc = screen.screen_vectors(spec_c, use_c, plan.screen_mmax, dim)
            for k in ks:
                lists = screen.coarse_partner_lists(Fc, coarse, plan.sep_cos, radius, k, use_c)
                for b in best:
                    if b is not None and b["ir"] == ir:
                        b.setdefault("hier_rank", {})[k] = screen._hier_rank(F, plan.centres, use, cover, lists,
                                                                      plan.sep_cos, b["i"], b["j"])
    for q, b in enumerate(best):
        if b is not None:
            b["ranks_by_radius"] = at_radius[q]
            out.append(b)
    return out


# --------------------------------------------------------------------------- the chunk kernel
def scan_chunk(plan: SearchPlan, chunk) -> ChunkResult:
    ir, ib = chunk
    spec = ring_set(plan, ir)
    i, j = _block_pairs(plan, ib, ir)
    s, k = scan_pairs(spec, i, spec, j, plan.min_valid_fraction, workers=plan.threads)
    peak_s = np.full(2, -np.inf)
    peak_idx = np.zeros((2, 3), dtype=np.int64)
    keep_s, keep_i, keep_j, keep_sense, keep_k = [], [], [], [], []
    for sense in (0, 1):
        if s.shape[1] == 0:
            continue
        row = s[sense]
        nk = min(plan.keep, row.size)
        top = np.argpartition(-row, nk - 1)[:nk] if nk < row.size else np.arange(row.size)
        top = top[np.isfinite(row[top])]
        keep_s.append(row[top]); keep_i.append(i[top]); keep_j.append(j[top])
        keep_sense.append(np.full(top.size, sense, np.int8)); keep_k.append(k[sense, top])
        if top.size:
            b = top[np.lexsort((j[top], i[top], -row[top]))[0]]
            peak_s[sense] = row[b]
            peak_idx[sense] = (i[b], j[b], k[sense, b])
    cat = (lambda xs, dt: np.concatenate(xs).astype(dt) if xs else np.zeros(0, dt))
    res = ChunkResult(chunk, cat(keep_s, np.float64), cat(keep_i, np.int64), cat(keep_j, np.int64),
                      cat(keep_sense, np.int8), cat(keep_k, np.int64), peak_s, peak_idx, int(i.size),
                      s_moments(s))
    order = np.lexsort((res.k, res.sense, res.j, res.i, -res.s))
    for name in ("s", "i", "j", "sense", "k"):
        setattr(res, name, getattr(res, name)[order])
    return res


def s_moments(s) -> np.ndarray:
    """(2, 3): count, sum and sum of squares of the finite S of every scanned pair, per sense."""
    out = np.zeros((2, 3))
    for sense in (0, 1):
        if s.ndim == 2 and s.shape[1]:
            v = s[sense][np.isfinite(s[sense])]
            out[sense] = (v.size, v.sum(), np.sum(v * v))
    return out


# --------------------------------------------------------------------------- combining chunks
@dataclass
class Pool:
    """Best pairs per radius and peaks, combined over chunks (order-independent)."""
    radius_index: np.ndarray
    s: np.ndarray
    i: np.ndarray
    j: np.ndarray
    sense: np.ndarray
    k: np.ndarray
    peak_s: np.ndarray        # (n_radii, 2)
    peak_idx: np.ndarray      # (n_radii, 2, 3)
    pairs_scanned: int
    moments: np.ndarray = None   # (n_radii, 2, 3): count, sum, sum of squares of all pairs' S (None if unknown)


def combine(plan: SearchPlan, results) -> Pool:
    results = sorted(results, key=lambda r: tuple(r.chunk))
    nr = len(plan.radii_deg)
    peak_s = np.full((nr, 2), -np.inf)
    peak_idx = np.zeros((nr, 2, 3), dtype=np.int64)
    parts = {ir: [] for ir in range(nr)}
    total = 0
    for r in results:
        ir = r.chunk[0]
        parts[ir].append(r)
        total += r.pairs
        for sense in (0, 1):
            cur = peak_s[ir, sense]
            cand = r.peak_s[sense]
            if cand > cur or (cand == cur and np.isfinite(cand) and tuple(r.peak_idx[sense]) < tuple(peak_idx[ir, sense])):
                peak_s[ir, sense] = cand
                peak_idx[ir, sense] = r.peak_idx[sense]
    moments = np.zeros((nr, 2, 3))
    for r in results:
        if getattr(r, "moments", None) is None:
            moments = None
            break
        moments[r.chunk[0]] += r.moments
    cols = {n: [] for n in ("radius_index", "s", "i", "j", "sense", "k")}
    for ir in range(nr):
        if not parts[ir]:
            continue
        s = np.concatenate([p.s for p in parts[ir]])
        i = np.concatenate([p.i for p in parts[ir]])
        j = np.concatenate([p.j for p in parts[ir]])
        sense = np.concatenate([p.sense for p in parts[ir]])
        k = np.concatenate([p.k for p in parts[ir]])
        sel = []
        for sn in (0, 1):
            idx = np.flatnonzero(sense == sn)
            idx = idx[np.lexsort((k[idx], j[idx], i[idx], -s[idx]))][: plan.keep]
            sel.append(idx)
        sel = np.concatenate(sel)
        cols["radius_index"].append(np.full(sel.size, ir))
        for n, arr in (("s", s), ("i", i), ("j", j), ("sense", sense), ("k", k)):
            cols[n].append(arr[sel])
    cat = {n: (np.concatenate(v) if v else np.zeros(0)) for n, v in cols.items()}
    return Pool(cat["radius_index"].astype(int), cat["s"].astype(float), cat["i"].astype(int), cat["j"].astype(int),
                cat["sense"].astype(int), cat["k"].astype(int), peak_s, peak_idx, total, moments)


def grid_z(pool: Pool) -> np.ndarray:
    """Each kept pair's grid S standardised by all scanned pairs of its radius and sense: (S - mean) / std.

    Chance matches are larger on small circles (fewer independent samples), so raw S is not
    comparable across radii; nearly all scanned pairs are unrelated circles, so their mean and
    spread at one radius set the scale there.  Falls back to S itself when the moments are unknown.
    """
    if pool.moments is None or pool.s.size == 0:
        return np.asarray(pool.s, float)
    n, s1, s2 = (pool.moments[pool.radius_index, pool.sense, q] for q in range(3))
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = s1 / n
        sd = np.sqrt(np.maximum(s2 / n - mean**2, 0.0) * n / np.maximum(n - 1, 1))
        z = (pool.s - mean) / sd
    return np.where(np.isfinite(z), z, -np.inf)


# --------------------------------------------------------------------------- refinement
def _tangent_basis(c):
    c = rings.unit(c)
    ref = np.array([0.0, 0.0, 1.0]) if abs(c[2]) < 0.9 else np.array([1.0, 0.0, 0.0])
    u = rings.unit(np.cross(ref, c))
    v = np.cross(c, u)
    return u, v


def _offset(c, u, v, dx, dy):
    return rings.unit(c + math.radians(dx) * u + math.radians(dy) * v)


def valid_fraction(plan: SearchPlan, c1, c2, radius_deg):
    """Smaller of the two rings' unmasked fractions (1 on a full sky)."""
    if plan.mask is None:
        return 1.0
    alpha = math.radians(radius_deg)
    nsamp = rings.samples_for(alpha, plan.lmax)
    pts = np.concatenate([rings.ring_points(c1, alpha, nsamp), rings.ring_points(c2, alpha, nsamp)])
    w = rings.mask_at(plan.mask, pts)
    return float(min(w[0].mean(), w[1].mean()))


REFINE_EPSILON = 1e-10   # ducc0 accuracy of the off-grid synthesis: batched and single calls agree to ~1e-11


def _curves(t1, t2, flip, w, oversample):
    """S over ``N * oversample`` twists for rings (B, N) without masks (the Fourier form of
    :func:`twinring.statistic.s_curve`, for a batch of pairs, ring weights ``w`` (B, N // 2 + 1)):
    (B, N * oversample)."""
    nsamp = t1.shape[-1]
    a1 = scipy.fft.rfft(t1, axis=-1)
    a2 = scipy.fft.rfft(t2, axis=-1)
    x = w * (a1 if flip else np.conj(a1)) * a2
    den = np.sum(w * (np.abs(a1) ** 2 + np.abs(a2) ** 2), axis=-1)
    n_out = nsamp * oversample
    xp = np.zeros((t1.shape[0], n_out // 2 + 1), dtype=complex)
    xp[:, : x.shape[1]] = x
    if nsamp % 2 == 0:
        xp[:, nsamp // 2] = 0
    return 2 * np.real(scipy.fft.irfft(xp, n=n_out, axis=-1) * n_out / 2) / den[:, None]


def _best_twist(curve):
    """Best value of a periodic curve and its position (radians), refined by a parabola through the
    best grid point and its neighbours."""
    n_out = curve.size
    kk = int(np.argmax(curve))
    best = curve[kk]
    ym, yp = curve[kk - 1], curve[(kk + 1) % n_out]
    denom = ym - 2 * best + yp
    delta = 0.5 * (ym - yp) / denom if denom < 0 else 0.0
    return float(best), 2 * math.pi * (kk + delta) / n_out


def pair_statistics(plan: SearchPlan, items, oversample=8):
    """Best S over twist, per sense, for many pairs at any centres and radii, with one synthesis call.

    ``items``: (c1, c2, radius_deg, min_valid) per pair (``min_valid`` None = ``plan.min_valid_fraction``).
    Returns one ``[(s, twist_ref_rad) flip false, (s, twist_ref_rad) flip true]`` per item; a pair
    whose rings have less than ``min_valid`` of their samples unmasked gets S = -inf.
    """
    items = list(items)
    if not items:
        return []
    groups = {}                                      # samples per ring -> item indices (one call per group)
    for q, (_, _, radius_deg, _) in enumerate(items):
        groups.setdefault(rings.samples_for(math.radians(radius_deg), plan.lmax), []).append(q)
    pts, layout = [], []
    for n, qs in groups.items():
        alpha = np.array([math.radians(items[q][2]) for q in qs])
        c1 = np.array([items[q][0] for q in qs], dtype=float).reshape(-1, 3)
        c2 = np.array([items[q][1] for q in qs], dtype=float).reshape(-1, 3)
        both = np.concatenate([_ring_points_radii(c1, alpha, n), _ring_points_radii(c2, alpha, n)])
        pts.append(both.reshape(-1, 3))
        layout.append((n, qs))
    allpts = np.concatenate(pts)
    vals = rings.synthesize_at(plan.alm, plan.lmax, allpts, nthreads=plan.threads, epsilon=REFINE_EPSILON)
    wts = rings.mask_at(plan.mask, allpts)
    out = [None] * len(items)
    off = 0
    for n, qs in layout:
        k = len(qs)
        v = vals[off:off + 2 * k * n].reshape(2, k, n)
        if wts is None:
            w = np.stack([m_weights(n, plan.weights(items[q][2], n)) for q in qs])
            res = [_curves(v[0], v[1], flip, w, oversample) for flip in (False, True)]
            for row, q in enumerate(qs):
                out[q] = [_best_twist(res[f][row]) for f in (0, 1)]
        else:
            u = wts[off:off + 2 * k * n].reshape(2, k, n)
            for row, q in enumerate(qs):
                min_valid = plan.min_valid_fraction if items[q][3] is None else float(items[q][3])
                if min(u[0, row].mean(), u[1, row].mean()) < min_valid:
                    out[q] = [(-np.inf, 0.0), (-np.inf, 0.0)]
                    continue
                wq = plan.weights(items[q][2], n)
                out[q] = [_best_twist(s_curve(v[0, row], v[1, row], flip, wq, u[0, row], u[1, row]))
                          for flip in (False, True)]
        off += 2 * k * n
    return out


def _ring_points_radii(centres, alpha, nsamp):
    """:func:`twinring.rings.ring_points` (reference frame) for centres (k, 3) with a radius each (k,)."""
    c = rings.unit(np.atleast_2d(centres))
    e1, e2 = rings.phase_frame(c, None)
    phi = 2 * np.pi * np.arange(nsamp) / nsamp
    ca, sa = np.cos(alpha)[:, None, None], np.sin(alpha)[:, None, None]
    cp, sp = np.cos(phi)[None, :, None], np.sin(phi)[None, :, None]
    return ca * c[:, None, :] + sa * (cp * e1[:, None, :] + sp * e2[:, None, :])


def pair_statistic(plan: SearchPlan, c1, c2, radius_deg, oversample=8, min_valid=None):
    """Best S over twist for one pair at any centres and radius: (s, twist_ref_rad) per sense.

    A pair whose rings have less than ``min_valid`` (default ``plan.min_valid_fraction``) of their
    samples unmasked gets S = -inf.
    """
    return pair_statistics(plan, [(c1, c2, radius_deg, min_valid)], oversample)[0]


class _Setup:
    """One candidate's refinement: start, tangent bases, bounds and the map from offsets to circles."""

    def __init__(self, plan, c1, c2, radius_deg, sense, antipodal):
        self.c1, self.c2, self.radius_deg, self.sense, self.antipodal = c1, c2, radius_deg, int(sense), antipodal
        self.v0 = max(plan.min_valid_fraction, valid_fraction(plan, c1, c2, radius_deg) - 1e-9)
        self.u1, self.v1 = _tangent_basis(c1)
        self.u2, self.v2 = _tangent_basis(c2)
        self.step = plan.grid_deg
        self.r_step = radius_step(plan)
        # stay near the grid point and inside the searched radii: a refinement that wanders off to
        # tiny circles finds spurious matches (a ring of a few pixels is all gradient)
        self.r_lo = max(min(plan.radii_deg) - self.r_step, 0.5 * min(plan.radii_deg))
        self.r_hi = min(max(plan.radii_deg) + self.r_step, 90.0)
        self.n = 3 if antipodal else 5
        self.x0 = np.zeros(self.n)
        simplex = [self.x0]
        scales = [0.5 * self.step, 0.5 * self.step, 0.5 * self.r_step, 0.5 * self.step, 0.5 * self.step][:self.n]
        for d in range(self.n):
            e = np.zeros(self.n)
            e[d] = scales[d]
            simplex.append(e)
        self.simplex = np.array(simplex)
        self.options = dict(initial_simplex=self.simplex, xatol=0.02, fatol=1e-4, maxfev=40 * self.n)

    def unpack(self, x):
        a = _offset(self.c1, self.u1, self.v1, x[0], x[1])
        if self.antipodal:
            return a, -a, self.radius_deg + x[2]
        return a, _offset(self.c2, self.u2, self.v2, x[3], x[4]), self.radius_deg + x[2]

    def outside(self, x, r):
        return (not (self.r_lo <= r <= self.r_hi) or abs(x[2]) > 1.5 * self.r_step
                or bool(np.any(np.abs(np.delete(x, 2)) > 1.5 * self.step)))


def refine_candidate(plan: SearchPlan, c1, c2, radius_deg, sense, antipodal):
    """Local maximisation of S over centres and radius (Nelder-Mead), twist maximised inside.

    The refined pair keeps at least the unmasked fraction of the grid pair it starts from (and
    ``min_valid_fraction``): moving rings into the mask, where fewer samples count, would raise
    S by chance alone.  One candidate at a time with scipy's Nelder-Mead; :func:`refine_candidates`
    does the same for many candidates at once.
    """
    st = _Setup(plan, c1, c2, radius_deg, sense, antipodal)

    def negs(x):
        a, b, r = st.unpack(x)
        if st.outside(x, r):
            return 2.0
        return -pair_statistic(plan, a, b, r, min_valid=st.v0)[st.sense][0]

    res = minimize(negs, st.x0, method="Nelder-Mead", options=st.options)
    a, b, r = st.unpack(res.x)
    s0 = -negs(st.x0)
    if -res.fun < s0:   # never worse than the start
        a, b, r = st.unpack(st.x0)
    s, tw = pair_statistic(plan, a, b, r, min_valid=st.v0)[st.sense]
    return a, b, float(min(r, 90.0)), s, tw


class _TooMany(Exception):
    pass


def nelder_mead_steps(initial_simplex, xatol, fatol, maxfev):
    """scipy's Nelder-Mead (``scipy.optimize.minimize(method='Nelder-Mead')`` without bounds, not
    adaptive; the same steps, tests and stopping rules) as a generator: it yields each point to be
    evaluated and is sent the value; it returns ``(x, fun)``.  Lets many minimisations advance in
    lockstep with their evaluations batched."""
    rho, chi, psi, sigma = 1, 2, 0.5, 0.5
    sim = np.asarray(initial_simplex, dtype=float).copy()
    N = sim.shape[1]
    calls = [0]

    def f(x):
        if calls[0] >= maxfev:
            raise _TooMany
        calls[0] += 1
        v = yield np.copy(x)
        return float(v)

    fsim = np.full((N + 1,), np.inf, dtype=float)
    try:
        for k in range(N + 1):
            fsim[k] = yield from f(sim[k])
    except _TooMany:
        pass
    finally:
        ind = np.argsort(fsim)
        sim = np.take(sim, ind, 0)
        fsim = np.take(fsim, ind, 0)
    ind = np.argsort(fsim)
    fsim = np.take(fsim, ind, 0)
    sim = np.take(sim, ind, 0)
    while calls[0] < maxfev:
        try:
            if (np.max(np.ravel(np.abs(sim[1:] - sim[0]))) <= xatol and
                    np.max(np.abs(fsim[0] - fsim[1:])) <= fatol):
                break
            xbar = np.add.reduce(sim[:-1], 0) / N
            xr = (1 + rho) * xbar - rho * sim[-1]
            fxr = yield from f(xr)
            doshrink = 0
            if fxr < fsim[0]:
                xe = (1 + rho * chi) * xbar - rho * chi * sim[-1]
                fxe = yield from f(xe)
                if fxe < fxr:
                    sim[-1] = xe
                    fsim[-1] = fxe
                else:
                    sim[-1] = xr
                    fsim[-1] = fxr
            else:
                if fxr < fsim[-2]:
                    sim[-1] = xr
                    fsim[-1] = fxr
                else:
                    if fxr < fsim[-1]:
                        xc = (1 + psi * rho) * xbar - psi * rho * sim[-1]
                        fxc = yield from f(xc)
                        if fxc <= fxr:
                            sim[-1] = xc
                            fsim[-1] = fxc
                        else:
                            doshrink = 1
                    else:
                        xcc = (1 - psi) * xbar + psi * sim[-1]
                        fxcc = yield from f(xcc)
                        if fxcc < fsim[-1]:
                            sim[-1] = xcc
                            fsim[-1] = fxcc
                        else:
                            doshrink = 1
                    if doshrink:
                        for j in range(1, N + 1):
                            sim[j] = sim[0] + sigma * (sim[j] - sim[0])
                            fsim[j] = yield from f(sim[j])
        except _TooMany:
            pass
        ind = np.argsort(fsim)
        sim = np.take(sim, ind, 0)
        fsim = np.take(fsim, ind, 0)
    return sim[0], float(np.min(fsim))


def refine_candidates(plan: SearchPlan, starts, antipodal, progress=None):
    """:func:`refine_candidate` for many grid candidates at once: the Nelder-Mead searches advance in
    lockstep and every round evaluates all their trial pairs in one synthesis call.

    ``starts``: (c1, c2, radius_deg, sense) per candidate.  Returns (c1, c2, radius_deg, s, twist_ref)
    per candidate, as :func:`refine_candidate` would (to the synthesis accuracy ``REFINE_EPSILON``).
    """
    setups = [_Setup(plan, c1, c2, r, sense, antipodal) for c1, c2, r, sense in starts]
    gens = [nelder_mead_steps(st.simplex, st.options["xatol"], st.options["fatol"], st.options["maxfev"])
            for st in setups]
    results = [None] * len(setups)
    pending = {}

    def advance(q, value, first=False):
        st, gen = setups[q], gens[q]
        try:
            x = next(gen) if first else gen.send(value)
            while True:
                a, b, r = st.unpack(x)
                if not st.outside(x, r):
                    pending[q] = (a, b, r, st.v0)
                    return
                x = gen.send(2.0)
        except StopIteration as stop:
            results[q] = stop.value

    for q in range(len(setups)):
        advance(q, None, first=True)
    rounds = 0
    while pending:
        qs = sorted(pending)
        out = pair_statistics(plan, [pending[q] for q in qs])
        pending.clear()
        for q, o in zip(qs, out):
            advance(q, -o[setups[q].sense][0])
        rounds += 1
    starts0 = pair_statistics(plan, [(*st.unpack(st.x0), st.v0) for st in setups])
    chosen = []
    for q, st in enumerate(setups):
        x, fun = results[q]
        s0 = starts0[q][st.sense][0]
        chosen.append(st.unpack(st.x0) if -fun < s0 else st.unpack(x))   # never worse than the start
    final = pair_statistics(plan, [(a, b, r, st.v0) for (a, b, r), st in zip(chosen, setups)])
    out = []
    for (a, b, r), st, f in zip(chosen, setups, final):
        s, tw = f[st.sense]
        out.append((a, b, float(min(r, 90.0)), s, tw))
    return out


# --------------------------------------------------------------------------- candidates
def suppress(c1, c2, radius, s, centre_tol_deg, radius_tol_deg, limit=None):
    """Greedy non-maximum suppression: indices of kept entries, strongest first.

    An entry is dropped when a stronger kept one has both centres within
    ``centre_tol_deg`` (in either order) and a radius within ``radius_tol_deg``.
    """
    order = np.lexsort((radius, -s))
    cos_tol = math.cos(math.radians(centre_tol_deg))
    kept = []
    k1 = np.zeros((0, 3)); k2 = np.zeros((0, 3)); kr = np.zeros(0)
    for idx in order:
        if kept:
            same = ((k1 @ c1[idx] >= cos_tol) & (k2 @ c2[idx] >= cos_tol)) | (
                (k1 @ c2[idx] >= cos_tol) & (k2 @ c1[idx] >= cos_tol))
            if np.any(same & (np.abs(kr - radius[idx]) <= radius_tol_deg)):
                continue
        kept.append(idx)
        k1 = np.vstack([k1, c1[idx]]); k2 = np.vstack([k2, c2[idx]]); kr = np.append(kr, radius[idx])
        if limit is not None and len(kept) >= limit:
            break
    return np.array(kept, dtype=int)


def map_correlation(alm, lmax, theta_rad):
    """Correlation of the prepared map at angular lag ``theta`` over lag 0: xi(theta)/xi(0).

    xi(theta) = sum_l (2l+1)/(4 pi) C_l P_l(cos theta) with C_l of ``alm`` (l >= 1).
    """
    cl = hp.alm2cl(np.asarray(alm), lmax=int(lmax))
    cl[0] = 0.0
    coef = (2 * np.arange(cl.size) + 1) * cl
    return float(np.polynomial.legendre.legval(math.cos(theta_rad), coef) / max(coef.sum(), 1e-300))


def grid_retention(alm, lmax, radius_step_deg, centre_step_deg):
    """Expected fraction of S kept by a true circle half a grid step off in radius and in centre.

    Each ring's samples lie about delta = sqrt((dr/2)^2 + (dc/2)^2) from the true
    circle's, on opposite sides once matched, so S falls by about the map's own
    correlation at lag 2 delta, xi(2 delta)/xi(0).  An estimate: on cubic-torus skies
    (3 deg beam) it is within 0.11 of the measured ratio for offsets up to 4.5 deg,
    with flat or |m| weighting (tests/test_search.py).  Returns (delta_deg, retention).
    """
    delta = math.hypot(0.5 * float(radius_step_deg), 0.5 * float(centre_step_deg))
    return delta, map_correlation(alm, lmax, math.radians(2.0 * delta))


GRID_RETENTION_WARN = 0.9     # warn when a circle half a step off the grid keeps less S than this


def grid_warning(prepared, scfg):
    """A warning line when the grid is coarse against the prepared map's correlation length, else None."""
    radii = np.asarray(scfg.radii_deg(), float)
    dr = float(np.min(np.diff(radii))) if radii.size > 1 else 0.0
    dc = hp.nside2resol(int(scfg.nside_centers), arcmin=True) / 60.0 if scfg.family != "listed" else 0.0
    delta, keep = grid_retention(prepared.alm, prepared.lmax, dr, dc)
    if keep >= GRID_RETENTION_WARN:
        return None
    return (f"warning: coarse grid: a circle half a step off (radius step {dr:g} deg, centre spacing {dc:.2f} deg, "
            f"{delta:.2f} deg off) keeps about {keep:.0%} of its S at the prepared beam {prepared.fwhm_deg:g} deg; "
            "a finer search.radius_deg step or larger search.nside_centers keeps more")


def radius_step(plan: SearchPlan):
    return float(np.min(np.diff(plan.radii_deg))) if len(plan.radii_deg) > 1 else 1.0


def radius_window(plan: SearchPlan):
    return max(3.0, 3 * radius_step(plan))


def finalize(plan: SearchPlan, pool: Pool, top: int, refine=True, progress=None) -> tuple[Table, Table]:
    radii = np.asarray(plan.radii_deg)
    c = plan.centres
    c1, c2 = c[pool.i], c[pool.j]
    rad = radii[pool.radius_index] if pool.s.size else np.zeros(0)
    ctol = 2.5 * plan.grid_deg
    rtol = radius_window(plan)
    zg = grid_z(pool)
    keep = suppress(c1, c2, rad, pool.s, ctol, rtol, limit=top + max(5, top // 5))
    antipodal = plan.family == "antipodal"
    rows = []
    refined = None
    if refine and keep.size:
        # all candidates at once: one synthesis call per round of their Nelder-Mead steps
        starts = [(c1[idx], c2[idx], float(rad[idx]), int(pool.sense[idx])) for idx in keep]
        if progress is not None:
            starts = list(progress(starts, desc="refine", unit="cand"))
        refined = refine_candidates(plan, starts, antipodal)
    for q, idx in enumerate(keep):
        sense = int(pool.sense[idx])
        ir = int(pool.radius_index[idx])
        beta_ref = 2 * math.pi * pool.k[idx] / plan.nsamp[ir]
        a, b, r, s_ref = c1[idx], c2[idx], float(rad[idx]), float(pool.s[idx])
        if refined is not None:
            a, b, r, s_new, beta_new = refined[q]
            if s_new >= s_ref:
                s_ref, beta_ref = s_new, beta_new
            else:
                a, b, r = c1[idx], c2[idx], float(rad[idx])
        rows.append((a, b, r, s_ref, float(pool.s[idx]), sense, beta_ref, float(zg[idx])))
    if rows:
        # uncalibrated ranking: grid S (refined s is descriptive only: refinement adds chance gains);
        # calibration re-ranks by p_global. z_grid (S standardised over all pairs of its radius and
        # sense) is reported beside it: on general searches near-coincident large circles inflate it.
        A = np.array([x[0] for x in rows]); B = np.array([x[1] for x in rows])
        R = np.array([x[2] for x in rows]); S = np.array([x[4] for x in rows])
        again = suppress(A, B, R, S, ctol, rtol, limit=top)
        rows = [rows[q] for q in again]
    cand = candidate_table(rows)
    return cand, peak_table(plan, pool)


def candidate_table(rows) -> Table:
    names = ["rank", "radius_deg", "lon1_deg", "lat1_deg", "lon2_deg", "lat2_deg", "separation_deg",
             "twist_deg", "flip", "s", "s_grid", "z_grid"]
    if not rows:
        return Table(names=names, dtype=[int, float, float, float, float, float, float, float, bool, float, float,
                                         float])
    A = np.array([x[0] for x in rows]); B = np.array([x[1] for x in rows])
    flip = np.array([x[5] == 1 for x in rows])
    beta = np.array([x[6] for x in rows])
    tw = rings.wrap_twist_deg(np.degrees(rings.twist_from_reference(beta, A, B, flip)), 6)
    lon1, lat1 = rings.vec_to_lonlat(A)
    lon2, lat2 = rings.vec_to_lonlat(B)
    t = Table()
    t["rank"] = np.arange(1, len(rows) + 1)
    t["radius_deg"] = [x[2] for x in rows]
    t["lon1_deg"], t["lat1_deg"], t["lon2_deg"], t["lat2_deg"] = lon1, lat1, lon2, lat2
    t["separation_deg"] = rings.separation_deg(A, B)
    t["twist_deg"] = tw
    t["flip"] = flip
    t["s"] = [x[3] for x in rows]
    t["s_grid"] = [x[4] for x in rows]
    t["z_grid"] = [x[7] if len(x) > 7 else np.nan for x in rows]
    for col in t.colnames:
        if t[col].dtype.kind == "f":
            t[col].info.format = ".6f"
    return t


def peak_table(plan: SearchPlan, pool: Pool) -> Table:
    rows = []
    for ir, r in enumerate(plan.radii_deg):
        for sense in (0, 1):
            s = pool.peak_s[ir, sense]
            i, j, k = pool.peak_idx[ir, sense]
            if not np.isfinite(s):
                rows.append((r, bool(sense), np.nan, np.nan, np.nan, np.nan, np.nan, np.nan, np.nan))
                continue
            a, b = plan.centres[i], plan.centres[j]
            tw = math.degrees(float(rings.twist_from_reference(2 * math.pi * k / plan.nsamp[ir], a, b, bool(sense))[0]))
            lon1, lat1 = rings.vec_to_lonlat(a)
            lon2, lat2 = rings.vec_to_lonlat(b)
            rows.append((r, bool(sense), float(s), float(lon1), float(lat1), float(lon2), float(lat2),
                         float(rings.separation_deg(a, b)), rings.wrap_twist_deg(tw, 6)))
    t = Table(rows=rows, names=["radius_deg", "flip", "s", "lon1_deg", "lat1_deg", "lon2_deg", "lat2_deg",
                                "separation_deg", "twist_deg"],
              dtype=[float, bool, float, float, float, float, float, float, float])
    for col in t.colnames:
        if t[col].dtype.kind == "f":
            t[col].info.format = ".6f"
    return t


def run_search(prepared, scfg, compute=None, listed_table=None, runner=None, progress=None, key="", ring_filter=None):
    """The whole search on a prepared map: plan, scan every chunk, combine, finalize (``ring_filter``:
    :func:`make_plan`)."""
    plan = make_plan(prepared, scfg, compute, listed_table, key=key, ring_filter=ring_filter)
    chunks = plan.chunk_ids()
    if runner is None:
        from .execute import run_units

        results = list(run_units(scan_chunk, plan, chunks, compute=compute, tag="scan", progress=progress).values())
    else:
        results = runner(plan, chunks)
    pool = combine(plan, results)
    cand, peaks = finalize(plan, pool, scfg.top, refine=scfg.refine, progress=progress)
    return plan, pool, cand, peaks
