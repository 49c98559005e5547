"""A twist- and sense-invariant screen for the general-pair search (``search.method: fast``).

The exhaustive general search evaluates the exact S (all twists, both senses) on
every pair of centres at every radius.  ``fast`` first scores every pair of one
radius with a cheap statistic that does not depend on twist or sense, keeps for
each centre its ``screen_partners`` best partners (a pair survives when either
end selects it) and evaluates the exact S only on the survivors.  From nside_centers 64 on (by
default; ``search.screen_levels``) the all-pairs products run on the HEALPix grid one level coarser
and each fine centre chooses only among the children of its parent's kept coarse partners (notes at
"coarse to fine" below): about 3-4 times less screen work at nside_centers 64, with the same survival
of injected pairs (``REFERENCE_CAMPAIGN_HIERARCHY``).

The screen statistic
--------------------
A matched pair has ring 2 equal to ring 1 turned by the twist, traversed in the
same or the opposite sense: with b_m the sqrt(|m|)-weighted Fourier coefficients
of a ring (:class:`twinring.statistic.RingSpectra`), b2_m = b1_m e^{i m beta}
(flip false) or conj(b1_m) e^{i m beta} (flip true).  Two families of features
are unchanged by both:

* amplitudes |b_m|, m = 1..M (the ring's |m|-weighted amplitude spectrum);
* the real parts of the triple products b_m b_n conj(b_{m+n}), 1 <= m <= n,
  m + n <= M (the ring's bispectrum: the phases cancel under a turn and the
  product is conjugated under a reversal of sense), each divided by the square
  root of its modulus so the strongest modes do not dominate.

Each family is centred by its mean over all rings of the radius and normalised
per ring; the two are joined with weights sqrt(1 - w), sqrt(w) (w =
``AMPLITUDE_SHARE``), projected on the ``SCREEN_DIM`` leading principal
directions of all rings' joined vectors (eigenvectors of F^T F) and normalised
again; the screen score of a pair is the inner product of these unit vectors: a
correlation in [-1, 1], the same for either end.  A matched pair has nearly
equal vectors, which stay nearly equal in any projection, while the products
cost D/SCREEN_DIM (about 3) times less; survival with and without the
projection is in ``REFERENCE_CAMPAIGN`` and ``REFERENCE_CAMPAIGN_ALL_FEATURES``.  The
band M is the largest m at which the mean ring power at this radius exceeds
``BAND_FRACTION`` of its peak (the beam and lmax set it), capped by
``search.screen_mmax`` when that is positive; the triple products are taken in
order of increasing m + n up to ``TRIPLE_DIM`` of them.

Amplitudes alone are a weak screen (they are positive and share the mean
spectrum; a true partner typically ranked 0-40 among 12,288 centres at
nside_centers 32 and up to a few thousand at a neighbouring radius); the
closure phases carried by the triple products add many nearly uncorrelated
dimensions, so unrelated rings scatter much less while matched rings still
agree.  Measured figures are in ``REFERENCE_CAMPAIGN``.

Masked rings enter with the spectra of their zero-filled, filtered samples (the
``b`` of :func:`twinring.statistic.ring_spectra`); rings with fewer valid samples
than ``min_valid_fraction`` of the ring cannot reach the exact kernel's overlap
requirement with any partner and are dropped before the products.

Cost and memory
---------------
All pairs of one radius are scored by float32 matrix products (BLAS), each pair
once, tile by tile: ``BLOCK_ROWS`` rows of centres (fewer when
``compute.memory_gb`` demands it) against ``TILE_COLS`` columns from the block's
first row on; each tile is one task, product included, and the tasks run on
``compute.threads`` threads (command-line runs keep BLAS single-threaded, so the
threads are what uses the cores).  Beforehand, every centre's level is set from
a strided sample of its partners so that it has, with a margin, more than K
partners above it (the levels only decide which scores are carried: any levels
give the same selection).  In a tile every score is compared once with the
lower of its row's level and the tile's lowest column level, and only the ~2 %
that pass are tested exactly against their row's and their column's level; the
exact top K per centre is taken among the survivors (~170 per centre at
nside_centers 64) at the end (centres that fall short are redone exactly, so the
result is always exactly the top-K rule).
Pairs outside the separation range are excluded with precomputed per-centre
lists (discs about the centre and its antipode), checked with the same inclusive
test as :func:`twinring.search._block_pairs`, so the survivors are always a
subset of the exhaustive pair set; the same lists exclude the sampled partners
of the levels.  Memory: the features (n x D float32), one tile of scores and one
boolean tile per thread (16 MB and 4 MB), the candidates and the separation
lists; about 1 GB at nside_centers 64.

The matrix products are the floor of this design (about 3 s of one core per
radius at nside_centers 64 in 128 directions); the selection around them costs
about as much again.  Maximum-inner-product search indexes (faiss: exact flat,
IVF, HNSW) were measured against it by ``scripts/benchmark_mips.py``: the
separation exclusion makes them ask for K + ~450 partners per centre, and none
was faster at the survival required (figures in README, "Measured performance").
"""
from __future__ import annotations

import math
import threading

import numpy as np
import healpy as hp

BAND_FRACTION = 0.01      # band edge: mean ring power above this fraction of its peak
TRIPLE_DIM = 320          # triple products kept (lowest m + n first)
TRIPLE_POWER = 0.5        # each triple product divided by |product| ** TRIPLE_POWER
AMPLITUDE_SHARE = 0.3     # weight of the amplitude part in the joined correlation
BLOCK_ROWS = 1024         # centres per block of the all-pairs product
TILE_COLS = 4096          # columns per tile of a block, thresholded on its own
SCREEN_DIM = 128          # principal directions the scores use (0: all of the features)
COVER_FACTOR = 1.5        # cover radius of a coarse centre, in units of the largest fine-to-parent angle
SEP_TOL = 1e-12           # the same inclusive tolerance as twinring.search._block_pairs
_LOWEST = np.finfo(np.float32).min

# Survival of injected pairs through the screen (scores in SCREEN_DIM = 128 principal directions), measured
# with the campaign of scripts/benchmark_screen.py (--campaign 12, seed 2024) at nside_centers 16 and 32;
# ranks: {nside_centers: {screen rank: number of detected pairs}}; a pair survives K partners when rank < K.
# The one rank-48 pair at nside_centers 32 is a circle of true radius 18.4 deg detected at the edge of the
# 20-60 deg range (grid radius 1.6 deg off); every pair within the searched radii ranked 0-2.  In fewer
# directions that pair falls further (rank 59 at 96, 125 at 64, 146 at 48 directions: 98.99 % survival at
# K = 64 below 96), while every other pair stays at rank <= 12.
REFERENCE_CAMPAIGN: dict = dict(
    campaign=("12 tori and 12 half-turn spaces E2 of random size, orientation and observer; noiseless "
              "Sachs-Wolfe skies, Nside 64, lmax 128, 3 deg beam; separations 10-180 deg; radii 20-60 deg step 2; "
              f"screen scores in {SCREEN_DIM} principal directions"),
    s_min=0.6,
    ranks={16: {0: 89, 1: 4, 2: 1, 3: 1, 4: 1, 5: 1, 9: 1, 10: 1},
           32: {0: 96, 1: 1, 2: 1, 48: 1}},
)
# The same campaign scored with all features (SCREEN_DIM = 0), as measured before the reduction, for
# comparison; at nside_centers 64 on radii 10-90 deg step 1 with all features: ranks 0 (106 pairs), 1 (3).
REFERENCE_CAMPAIGN_ALL_FEATURES: dict = dict(
    ranks={16: {0: 92, 1: 2, 2: 1, 3: 2, 7: 1, 8: 1},
           32: {0: 96, 1: 2, 54: 1},
           64: {0: 106, 1: 3}},
)


# Survival through the coarse-to-fine screen (one coarse level, COVER_FACTOR 1.5) and the single-level screen
# at nside_centers 64, measured with scripts/benchmark_hierarchy.py (--skies 6, seeds 2024 and 2025: 12 tori
# and 12 half-turn spaces in all); ranks: {K: {rank: number of detected pairs}}, a pair survives K partners
# when its rank is < K (key None: pairs dropped at the coarse level; none with factor 1.5).  Every detected
# pair had the same rank in both screens at every K measured (8, 16, 32, 64): 110 of 110 survive (95 %
# lower bound 97.3 %, rule of three).  With children alone (factor 1) one pair of 110 was dropped at the
# coarse level at every K (notes at "coarse to fine").
REFERENCE_CAMPAIGN_HIERARCHY: dict = dict(
    campaign=("12 tori and 12 half-turn spaces E2 of random size, orientation and observer (seeds 2024, 2025); "
              "noiseless Sachs-Wolfe skies, Nside 64, lmax 128, 3 deg beam; separations 10-180 deg; radii 10-90 deg "
              f"step 1; screen scores in {SCREEN_DIM} principal directions; coarse-to-fine screen with 1 coarse "
              "level (Nside 32), cover factor 1.5"),
    s_min=0.6,
    nside_centers=64,
    levels=1,
    ranks={K: {0: 100, 1: 9, 2: 1} for K in (8, 16, 32, 64)},
    single_level_ranks={0: 100, 1: 9, 2: 1},
)


# --------------------------------------------------------------------------- features
def band_edge(spec, mmax=0):
    """Highest m used by the screen at this radius (see the module notes)."""
    top = spec.nsamp // 2 - 1
    b = spec.b
    power = np.zeros(b.shape[1])
    for lo in range(0, b.shape[0], 8192):
        blk = b[lo:lo + 8192]
        power += (blk.real.astype(np.float64) ** 2 + blk.imag.astype(np.float64) ** 2).sum(0)
    power[0] = 0.0
    if power.max() <= 0:
        return max(2, min(top, mmax or top))
    m = int(np.flatnonzero(power > BAND_FRACTION * power.max()).max())
    m = min(max(m, 4), top)
    if mmax:
        m = min(m, int(mmax))
    return max(m, 2)


def triple_index(mmax, limit):
    """Index pairs (m, n), 1 <= m <= n, m + n <= mmax, in order of m + n then m; at most ``limit``."""
    mm, nn = [], []
    for total in range(2, mmax + 1):
        for m in range(1, total // 2 + 1):
            mm.append(m)
            nn.append(total - m)
            if len(mm) >= limit:
                return np.array(mm), np.array(nn)
    return np.array(mm, dtype=int), np.array(nn, dtype=int)


def screen_features(spec, use=None, mmax=0, triple_dim=None):
    """Twist- and sense-invariant unit feature vectors (n, D) float32 of the rings in ``spec``.

    ``use``: boolean mask of rings that take part (others get zero rows).
    """
    n = spec.b.shape[0]
    use = np.ones(n, dtype=bool) if use is None else np.asarray(use, dtype=bool)
    m_top = band_edge(spec, mmax)
    mm, nn = triple_index(m_top, TRIPLE_DIM if triple_dim is None else triple_dim)
    nt = mm.size
    out = np.empty((n, nt + m_top), dtype=np.float32)
    slab = 4096
    for lo in range(0, n, slab):                     # raw features, in slabs of rings
        b = spec.b[lo:lo + slab].astype(np.complex128)
        t = b[:, mm] * b[:, nn] * np.conj(b[:, mm + nn])
        mod = np.abs(t)
        out[lo:lo + slab, :nt] = np.divide(t.real, mod ** TRIPLE_POWER, out=np.zeros_like(mod), where=mod > 0)
        out[lo:lo + slab, nt:] = np.abs(b[:, 1:m_top + 1])
    cnt = max(int(use.sum()), 1)
    mean = out[use].sum(axis=0, dtype=np.float64) / cnt if use.any() else np.zeros(out.shape[1])
    weights = (math.sqrt(1.0 - AMPLITUDE_SHARE), math.sqrt(AMPLITUDE_SHARE))
    for lo in range(0, n, slab):                     # centre over the rings, normalise per ring and part
        blk = out[lo:lo + slab].astype(np.float64) - mean
        blk[:, nt:] -= blk[:, nt:].mean(axis=1, keepdims=True)
        blk[~use[lo:lo + slab]] = 0.0
        for part, w in ((slice(0, nt), weights[0]), (slice(nt, None), weights[1])):
            x = blk[:, part]
            norm = np.linalg.norm(x, axis=1, keepdims=True)
            np.divide(x, norm / w, out=x, where=norm > 0)
        out[lo:lo + slab] = blk
    return out


def reduce_features(F, use=None, dim=None):
    """The screen vectors in ``dim`` dimensions: ``F`` (n, D) projected on its ``dim`` leading principal
    directions (eigenvectors of F^T F over the usable rings) and renormalised per ring, float32 (n, dim).

    Nearly all pairs are unrelated rings, whose inner products the projection spreads a little more; a
    matched pair has nearly equal vectors, which stay nearly equal in any projection.  ``dim`` None or
    not below D returns ``F`` unchanged.
    """
    dim = SCREEN_DIM if dim is None else int(dim)
    n, D = F.shape
    if dim <= 0 or dim >= D:
        return F
    use = np.ones(n, dtype=bool) if use is None else np.asarray(use, dtype=bool)
    C = np.zeros((D, D))
    for lo in range(0, n, 8192):
        blk = F[lo:lo + 8192][use[lo:lo + 8192]].astype(np.float64)
        C += blk.T @ blk
    w, V = np.linalg.eigh(C)
    P = np.ascontiguousarray(V[:, ::-1][:, :dim], dtype=np.float32)
    G = F @ P
    norm = np.linalg.norm(G, axis=1, keepdims=True)
    np.divide(G, norm, out=G, where=norm > 0)
    G[~use] = 0.0
    return np.ascontiguousarray(G, dtype=np.float32)


def screen_vectors(spec, use, mmax=0, dim=None):
    """The vectors whose inner products score pairs: :func:`screen_features` reduced by
    :func:`reduce_features` to ``dim`` (default ``SCREEN_DIM``) dimensions."""
    return reduce_features(screen_features(spec, use, mmax), use, dim)


def usable_rings(spec, min_valid_fraction):
    """Rings that can meet the exact kernel's overlap requirement with some partner."""
    n = spec.b.shape[0]
    ok = np.ones(n, dtype=bool)
    if spec.f3 is not None:
        part = ~spec.full
        valid = spec.f3[:, 0].real.astype(np.float64)
        need = min_valid_fraction * spec.nsamp - 0.5
        ok[part] = valid[part] >= need
    ok &= spec.norm > 0
    return ok


# --------------------------------------------------------------------------- separation range
_EXCL_CACHE: dict = {}


def excluded_partners(centres, sep_cos):
    """Per centre, the centres outside the separation range: CSR (indptr, indices), or None when the
    excluded part of the sky is large (then a dot-product test per block is cheaper)."""
    lo, hi = sep_cos
    n = centres.shape[0]
    frac = (1.0 - hi) / 2 + (1.0 + lo) / 2          # sky fraction of the two excluded discs
    if frac > 0.3:
        return None
    key = (n, float(lo), float(hi), centres[:: max(1, n // 64)].tobytes())
    hit = _EXCL_CACHE.get(key)
    if hit is not None:
        return hit
    nside = hp.npix2nside(n)
    pad = 2 * hp.nside2resol(nside) + 1e-6
    r_near = math.acos(min(1.0, max(-1.0, hi))) if hi < 1 else 0.0
    r_far = math.pi - math.acos(min(1.0, max(-1.0, lo))) if lo > -1 else 0.0
    parts, counts = [], np.zeros(n, dtype=np.int64)
    for i in range(n):
        c = centres[i]
        cand = []
        if hi < 1.0:
            cand.append(hp.query_disc(nside, c, r_near + pad, inclusive=True))
        if lo > -1.0:
            cand.append(hp.query_disc(nside, -c, r_far + pad, inclusive=True))
        cand = np.unique(np.concatenate(cand)) if cand else np.zeros(0, dtype=np.int64)
        d = centres[cand] @ c
        bad = cand[~((d >= lo - SEP_TOL) & (d <= hi + SEP_TOL))]
        parts.append(bad)
        counts[i] = bad.size
    indptr = np.concatenate([[0], np.cumsum(counts)])
    indices = np.concatenate(parts).astype(np.int32) if parts else np.zeros(0, np.int32)
    _EXCL_CACHE.clear()
    _EXCL_CACHE[key] = (indptr, indices)
    return indptr, indices


# --------------------------------------------------------------------------- selection
def _allowed_dots(d, sep_cos):
    lo, hi = sep_cos
    return (d >= lo - SEP_TOL) & (d <= hi + SEP_TOL)


def _row_thresholds(F, centres, sep_cos, partners, use, excl=None, threads=1):
    """Per row, a score that at least ``partners`` allowed partners reach: the ks-th best of a strided
    sample of columns, with ks chosen so that a row falls short with probability below about 1 %
    (rows that do fall short are redone exactly).  The thresholds only decide which scores are carried
    as candidates: any values give the same selection, fitting ones carry few.  Excluded partners come
    from the separation lists ``excl`` when given (else from the centres' dot products)."""
    n = F.shape[0]
    stride = max(1, partners // 4)
    cols = np.arange(0, n, stride)
    q = partners / stride
    x = (2.5 + math.sqrt(2.5 ** 2 + 4 * q)) / 2        # ks - 2.5 sqrt(ks) = q
    ks = int(math.ceil(x * x)) + 2
    thr = np.full(n, np.inf, dtype=np.float32)
    if ks >= cols.size:
        thr[use] = _LOWEST               # every allowed partner is a candidate
        return thr
    bad_cols = np.flatnonzero(~use[cols])
    if excl is not None:                 # excluded sampled partners: (row, sample column) from the lists
        indptr, indices = excl
        on = indices % stride == 0
        ex_r = np.repeat(np.arange(n, dtype=np.int64), np.diff(indptr))[on]
        ex_c = (indices[on] // stride).astype(np.int64)
    step = 2048

    def one(lo):
        hi = min(n, lo + step)
        s = F[lo:hi] @ F[cols].T
        if excl is not None:
            a, b = np.searchsorted(ex_r, (lo, hi))
            s[ex_r[a:b] - lo, ex_c[a:b]] = -np.inf
        else:
            s[~_allowed_dots(centres[lo:hi] @ centres[cols].T, sep_cos)] = -np.inf
        if bad_cols.size:
            s[:, bad_cols] = -np.inf
        own = np.arange(lo + (-lo) % stride, hi, stride)           # a centre is never its own partner
        s[own - lo, own // stride] = -np.inf
        t = np.partition(s, cols.size - ks, axis=1)[:, cols.size - ks]
        thr[lo:hi] = np.maximum(t, _LOWEST)

    _run(one, range(0, n, step), threads)
    thr[~use] = np.inf
    return thr


def _run(fn, items, threads):
    """``fn`` over ``items`` on up to ``threads`` threads (numpy releases the GIL in the array work)."""
    items = list(items)
    if threads <= 1 or len(items) <= 1:
        for it in items:
            fn(it)
        return
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=int(threads)) as ex:
        for _ in ex.map(fn, items):
            pass


def _select(rows, cols, vals, n, partners):
    """Per row, the ``partners`` best (row, col) entries, and the number of entries per row.

    One integer sort: the key packs the row, the score (order-preserving, to the bits left over) and
    the column, so equal scores go to the lower column."""
    bits = max(1, int(n - 1).bit_length())
    vbits = 63 - 2 * bits
    v = np.ascontiguousarray(vals, dtype=np.float32).view(np.int32).astype(np.int64)
    v ^= (v >> 31) & 0x7FFFFFFF          # order-preserving map of float32 bits to signed integers
    desc = 0x7FFFFFFF - v                # in [0, 2^32): best score first
    if vbits < 32:
        desc >>= 32 - vbits
    key = (rows.astype(np.int64) << (vbits + bits)) | (desc << bits) | cols.astype(np.int64)
    key.sort()
    r = key >> (vbits + bits)
    c = key & ((1 << bits) - 1)
    start = np.searchsorted(r, np.arange(n))
    rank = np.arange(r.size) - start[r]
    keep = rank < partners
    counts = np.bincount(r, minlength=n)
    return r[keep], c[keep], counts


def _exact_rows(F, centres, sep_cos, partners, use, which):
    """Exact top partners of the rows ``which`` (no thresholds)."""
    out_r, out_c = [], []
    for lo in range(0, which.size, 256):
        r = which[lo:lo + 256]
        s = F[r] @ F.T
        ok = _allowed_dots(centres[r] @ centres.T, sep_cos) & use[None, :]
        ok[np.arange(r.size), r] = False
        s[~ok] = -np.inf
        rr, cc = np.nonzero(ok)
        sel_r, sel_c, _ = _select(rr, cc, s[rr, cc], r.size, partners)
        out_r.append(r[sel_r]); out_c.append(sel_c)
    if not out_r:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    return np.concatenate(out_r).astype(np.int64), np.concatenate(out_c).astype(np.int64)


def block_rows_for(n, memory_gb):
    """Rows per block so that a block's scores and work arrays fit in a quarter of ``memory_gb``."""
    per_row = n * (4 + 1 + 1)            # float32 scores, two boolean masks
    rows = int(0.25 * memory_gb * 1e9 // max(per_row, 1))
    return int(max(16, min(BLOCK_ROWS, rows)))


def _tile_candidates(c, thr_r, thr_c):
    """Positions (r, col) and scores of the entries of the score tile ``c`` that reach their row's
    threshold ``thr_r`` or their column's ``thr_c``: one comparison with the lower of the row's
    threshold and the tile's lowest column threshold, then the exact test on the few that pass."""
    floor = np.minimum(thr_r, thr_c.min())
    passed = np.greater_equal(c, floor[:, None])
    pos = np.flatnonzero(passed)
    w = c.shape[1]
    r, cc = pos // w, pos % w
    v = c[r, cc]
    ok = (v >= thr_r[r]) | (v >= thr_c[cc])
    return r[ok], cc[ok], v[ok]


def top_partners(F, centres, sep_cos, partners, use=None, memory_gb=4.0, threads=1):
    """Surviving pairs (i, j), i < j, sorted: each usable centre keeps its ``partners`` best partners
    by screen score within the separation range; a pair survives when either end keeps it.

    Each pair is scored once (upper triangle of the score matrix, in blocks of rows); within a block,
    each tile of ``TILE_COLS`` columns is thresholded on its own (on up to ``threads`` threads): an entry
    is a candidate of row i when it reaches row i's threshold, of row j when it reaches row j's.
    """
    n = F.shape[0]
    use = np.ones(n, dtype=bool) if use is None else np.asarray(use, dtype=bool)
    if n == 0 or not use.any():
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    threads = max(1, int(threads or 1))
    excl = excluded_partners(centres, sep_cos)
    thr = _row_thresholds(F, centres, sep_cos, partners, use, excl, threads)
    rows_per = block_rows_for(n, memory_gb)
    width = max(1, min(TILE_COLS, n))
    tasks = [(lo, a) for lo in range(0, n, rows_per) for a in range(lo, n, width)]
    out = [None] * len(tasks)
    local = threading.local()

    def tile(k):
        lo, a = tasks[k]
        hi, b = min(n, lo + rows_per), min(n, a + width)
        buf = getattr(local, "buf", None)
        if buf is None:
            buf = local.buf = np.empty(rows_per * width, dtype=np.float32)
        c = buf[:(hi - lo) * (b - a)].reshape(hi - lo, b - a)
        np.matmul(F[lo:hi], F[a:b].T, out=c)       # rows lo..hi against columns a..b (a >= lo)
        if excl is not None:                        # partners outside the separation range
            indptr, indices = excl
            cols = indices[indptr[lo]:indptr[hi]]
            inside = (cols >= a) & (cols < b)
            r = np.repeat(np.arange(hi - lo), np.diff(indptr[lo:hi + 1]))[inside]
            c[r, cols[inside] - a] = -np.inf
        else:
            c[~_allowed_dots(centres[lo:hi] @ centres[a:b].T, sep_cos)] = -np.inf
        r, cc, v = _tile_candidates(c, thr[lo:hi], thr[a:b])
        r += lo
        cc += a
        keep = cc > r                               # each pair once, never a centre with itself
        out[k] = (r[keep].astype(np.int32), cc[keep].astype(np.int32), v[keep])

    _run(tile, range(len(tasks)), threads)
    I = [o[0] for o in out]; J = [o[1] for o in out]; V = [o[2] for o in out]
    del out
    I = np.concatenate(I).astype(np.int64); J = np.concatenate(J).astype(np.int64); V = np.concatenate(V)
    ok = np.isfinite(V) & use[I] & use[J]            # unusable rings take part in no pair
    I, J, V = I[ok], J[ok], V[ok]
    # directed candidates: (i -> j) when v reaches row i's threshold, (j -> i) when it reaches row j's
    a = V >= thr[I]
    b = V >= thr[J]
    rows = np.concatenate([I[a], J[b]]); cols = np.concatenate([J[a], I[b]]); vals = np.concatenate([V[a], V[b]])
    sel_r, sel_c, counts = _select(rows, cols, vals, n, partners)
    short = np.flatnonzero(use & (counts < partners) & (thr > _LOWEST))
    if short.size:
        drop = np.isin(sel_r, short)
        er, ec = _exact_rows(F, centres, sep_cos, partners, use, short)
        sel_r = np.concatenate([sel_r[~drop], er]); sel_c = np.concatenate([sel_c[~drop], ec])
    key = np.minimum(sel_r, sel_c) * n + np.maximum(sel_r, sel_c)
    key = np.sort(key)
    if key.size:
        key = key[np.concatenate([[True], key[1:] != key[:-1]])]
    return (key // n).astype(np.int64), (key % n).astype(np.int64)


def screen_pairs(spec, centres, sep_cos, partners, min_valid_fraction=0.5, mmax=0, memory_gb=4.0, dim=None,
                 threads=1):
    """The pairs of one radius that the fast search scans exactly: (i, j), i < j, sorted by (i, j)."""
    use = usable_rings(spec, min_valid_fraction)
    F = screen_vectors(spec, use, mmax, dim)
    return top_partners(F, centres, sep_cos, partners, use, memory_gb, threads)


# --------------------------------------------------------------------------- coarse to fine
# With ``search.screen_levels`` L > 0 the all-pairs products run on the HEALPix grid L levels coarser
# (nside_centers / 2^L, 4^L times fewer centres, 16^L times fewer pairs): rings of the same radius about
# the coarse centres give coarse screen vectors (the same features), and each coarse centre keeps its
# ``partners`` best coarse partners (either end, as above) within the separation range widened by twice
# the cover radius (below), so that no allowed fine pair is lost to the range test.
# A coarse centre covers the fine centres within ``COVER_FACTOR`` times the largest angle of a fine
# centre from its parent (the coarse pixel holding it in the NESTED hierarchy; the plan's centres are in
# RING order and are mapped through it): with factor 1 at one level, exactly its 4 children; with 1.5,
# also the nearer children of its neighbours (6.9 fine centres per coarse centre on average at
# nside_centers 64).  Children alone are not enough: the coarse centre nearest a circle's true centre is
# often a neighbour of the parent of the fine centre nearest it, and the parent pair can rank far down
# while the neighbouring coarse pair ranks 0.  Measured: at nside_centers 64 with children alone, a
# circle of radius 14.8 deg (REFERENCE_CAMPAIGN_HIERARCHY, second campaign) whose parent pair ranked 66
# (neighbouring coarse pairs 0) was dropped: 109 of 110 detected pairs survived; with factor 1.5 it
# survives.  On the torus of the tests at nside_centers 16 (coarse Nside 8, 7.3 deg) the parent pair of
# the best grid pair ranked 74 of 768; factor 1.5 keeps the best pairs there but still loses grid pairs
# of S 0.6-0.7 that the exhaustive search lists, so the coarse-to-fine screen is the default only from
# nside_centers 64 on (config.SearchSection.screen_setup).  Factor 1.5 costs about 1.3 s more per radius
# at nside_centers 64 (load 3), which K = 16 instead of 32 wins back in the exact scans.
# A fine centre's candidates are the fine centres covered by the kept partners of every coarse centre
# covering it (and by those coarse centres themselves); each usable fine centre keeps its ``partners``
# best candidates by fine screen score within the exact separation range (inclusive test, SEP_TOL) among
# usable rings, and a pair survives when either end keeps it: the survivors are a subset of the
# exhaustive pair set.  The fine products are only those of the candidates.


def coarse_grid(nside, levels):
    """The centres ``levels`` HEALPix levels coarser than the RING grid of ``nside`` and the cover:
    (coarse centres (nc, 3) in RING order, parent (n,) coarse index of every fine centre, cover
    (nc, q) fine indices covered by every coarse centre, padded with n, cover radius in radians: the
    largest angle of a fine centre from its parent)."""
    from . import rings

    levels = int(levels)
    nc_side = nside >> levels
    if nc_side < 1 or nc_side << levels != nside:
        raise ValueError(f"nside {nside} has no grid {levels} levels coarser")
    n = hp.nside2npix(nside)
    nest = hp.ring2nest(nside, np.arange(n))
    parent = hp.nest2ring(nc_side, nest >> (2 * levels)).astype(np.int64)
    children = np.argsort(parent, kind="stable").reshape(-1, 4 ** levels).astype(np.int64)
    coarse = rings.center_grid(nc_side)
    fine = rings.center_grid(nside)
    radius = COVER_FACTOR * float(np.arccos(np.clip(np.min(np.sum(fine * coarse[parent], axis=1)), -1.0, 1.0)))
    cos_r = math.cos(radius)
    nc = coarse.shape[0]
    near = np.concatenate([np.arange(nc)[None, :], hp.get_all_neighbours(nc_side, np.arange(nc))]).T   # (nc, 9)
    cand = np.where((near >= 0)[:, :, None], children[np.maximum(near, 0)], -1).reshape(nc, -1)
    d = np.einsum("akx,ax->ak", fine[np.maximum(cand, 0)], coarse)
    inside = (cand >= 0) & (d >= cos_r - 1e-12)
    inside[:, :children.shape[1]] = True                       # the children themselves, whatever rounding says
    q = int(inside.sum(axis=1).max())
    order = np.argsort(~inside, axis=1, kind="stable")[:, :q]
    cover = np.where(np.take_along_axis(inside, order, axis=1), np.take_along_axis(cand, order, axis=1), n)
    cover = np.sort(cover, axis=1)
    return coarse, parent, cover.astype(np.int64), radius


def widened_sep_cos(sep_cos, pad_rad):
    """The separation range (cos max, cos min) widened by ``pad_rad`` at both ends."""
    lo, hi = sep_cos
    far = min(math.pi, math.acos(min(1.0, max(-1.0, lo))) + pad_rad)
    near = max(0.0, math.acos(min(1.0, max(-1.0, hi))) - pad_rad)
    return math.cos(far), math.cos(near)


def coarse_partner_lists(Fc, coarse, sep_cos, radius, partners, use_c, memory_gb=4.0, threads=1):
    """Per coarse centre, its kept coarse partners and itself: CSR (indptr, indices) over coarse centres."""
    nc = Fc.shape[0]
    ci, cj = top_partners(Fc, coarse, widened_sep_cos(sep_cos, 2 * radius), partners, use_c, memory_gb, threads)
    own = np.arange(nc, dtype=np.int64)
    r = np.concatenate([ci, cj, own])
    c = np.concatenate([cj, ci, own])
    order = np.lexsort((c, r))
    r, c = r[order], c[order]
    indptr = np.searchsorted(r, np.arange(nc + 1))
    return indptr, c


def _padded(use, F=None, centres=None):
    """``use`` (and ``F``, ``centres``) with one more entry, index n: the cover's padding, never used."""
    out = [np.concatenate([np.asarray(use, bool), [False]])]
    if F is not None:
        out.append(np.concatenate([F, np.zeros((1, F.shape[1]), F.dtype)]))
        out.append(np.concatenate([centres, np.zeros((1, 3))]))
    return out


def coarse_use(use, cover, spec_c):
    """Coarse centres that take part: a covered fine ring is usable and the coarse ring has signal."""
    return _padded(use)[0][cover].any(axis=1) & (spec_c.norm > 0)


def _fine_batch(F, centres, sep_cos, partners, use, cover, lists, groups):
    """Candidates kept by the fine centres covered by the coarse centres ``groups`` (of similar numbers
    of kept coarse partners): their scores against the centres covered by the group's kept coarse
    partners, padded to the batch's longest list, one batched product; each usable row keeps its
    ``partners`` best allowed candidates (a tie at the K-th place within a group goes either way,
    unlike the single-level selection's lower index).  ``F``, ``centres``, ``use`` carry the padding
    entry.  Returns (rows, cols, scores)."""
    indptr, indices = lists
    deg = indptr[groups + 1] - indptr[groups]
    width = int(deg.max())
    q = cover.shape[1]
    slot = np.arange(width)[None, :] < deg[:, None]                      # (g, width)
    part = np.where(slot, indices[np.minimum(indptr[groups][:, None] + np.arange(width)[None, :],
                                             indices.size - 1)], 0)
    pad = use.size - 1
    cols = np.where(np.repeat(slot, q, axis=1), cover[part].reshape(groups.size, width * q), pad)
    cols.sort(axis=1)                                                    # covers overlap: each column once
    cols[:, 1:][cols[:, 1:] == cols[:, :-1]] = pad
    rows = cover[groups]                                                 # (g, q)
    s = np.matmul(F[rows], F[cols].transpose(0, 2, 1))                   # (g, q, width * q)
    d = np.matmul(centres[rows], centres[cols].transpose(0, 2, 1))
    ok = _allowed_dots(d, sep_cos) & use[cols][:, None, :] & use[rows][:, :, None]
    ok &= rows[:, :, None] != cols[:, None, :]
    s[~ok] = -np.inf
    s = s.reshape(groups.size * q, -1)
    cols_r = np.repeat(cols, q, axis=0)                                  # (g * q, width * q)
    if s.shape[1] > partners:
        top = np.argpartition(-s, partners - 1, axis=1)[:, :partners]
    else:
        top = np.broadcast_to(np.arange(s.shape[1]), s.shape)
    v = np.take_along_axis(s, top, axis=1)
    keep = np.isfinite(v)
    r = np.broadcast_to(rows.reshape(-1, 1), top.shape)[keep]
    c = np.take_along_axis(cols_r, top, axis=1)[keep]
    return r, c, v[keep]


def hierarchical_pairs(F, centres, use, Fc, coarse, use_c, cover, radius, sep_cos, partners,
                       memory_gb=4.0, threads=1):
    """Surviving pairs (i, j), i < j, sorted, of the coarse-to-fine screen (see the notes above)."""
    n = F.shape[0]
    use = np.asarray(use, bool)
    if n == 0 or not use.any():
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    lists = coarse_partner_lists(Fc, coarse, sep_cos, radius, partners, use_c, memory_gb, threads)
    indptr = lists[0]
    use_p, F_p, centres_p = _padded(use, F, centres)
    q = cover.shape[1]
    live = np.flatnonzero(use_p[cover].any(axis=1))
    live = live[np.argsort(np.diff(indptr)[live], kind="stable")]      # batches of similar list lengths
    width = max(1, int(np.diff(indptr).max()) * q)
    # per batch: gathered vectors, scores, dots and masks of q x width entries per group in 1/16 of memory_gb
    step = int(max(8, min(512, memory_gb * 1e9 / 16 / (q * width * (4 * F.shape[1] + 40) + 4 * width * F.shape[1]))))
    batches = [live[lo:lo + step] for lo in range(0, live.size, step)]
    out = [None] * len(batches)

    def batch(k):
        out[k] = _fine_batch(F_p, centres_p, sep_cos, partners, use_p, cover, lists, batches[k])

    _run(batch, range(len(batches)), max(1, int(threads or 1)))
    if not out:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    r = np.concatenate([o[0] for o in out]).astype(np.int64)
    c = np.concatenate([o[1] for o in out]).astype(np.int64)
    v = np.concatenate([o[2] for o in out])
    # a fine centre covered by several coarse centres got a selection from each: its K best of their union
    key = r * n + c
    order = np.argsort(key, kind="stable")
    key, v = key[order], v[order]
    first = np.concatenate([[True], key[1:] != key[:-1]]) if key.size else np.zeros(0, bool)
    key, v = key[first], v[first]
    sel_r, sel_c, _ = _select(key // n, key % n, v, n, partners)
    key = np.minimum(sel_r, sel_c) * n + np.maximum(sel_r, sel_c)
    key.sort()
    if key.size:
        key = key[np.concatenate([[True], key[1:] != key[:-1]])]
    return (key // n).astype(np.int64), (key % n).astype(np.int64)


def hierarchical_rank(F, centres, use, Fc, coarse, use_c, cover, radius, sep_cos, partners, i, j):
    """Rank of the pair (i, j) in the coarse-to-fine screen keeping ``partners`` at both levels: the
    better end's rank among its candidates (it survives when this is < partners), or None when j is not
    a candidate of i (the coarse stage dropped the pair)."""
    lists = coarse_partner_lists(Fc, coarse, sep_cos, radius, partners, use_c)
    return _hier_rank(F, centres, use, cover, lists, sep_cos, i, j)


def _hier_rank(F, centres, use, cover, lists, sep_cos, i, j):
    indptr, indices = lists
    n = F.shape[0]
    best = None
    for a, b in ((i, j), (j, i)):
        over = np.flatnonzero(np.any(cover == a, axis=1))             # coarse centres covering a
        parts = np.concatenate([indices[indptr[p]:indptr[p + 1]] for p in over])
        cols = np.unique(cover[parts].ravel())
        cols = cols[cols < n]
        if not np.any(cols == b):
            continue
        ok = _allowed_dots(centres[cols] @ centres[a], sep_cos) & use[cols] & (cols != a)
        s = np.where(ok, F[cols] @ F[a], -np.inf)
        v = s[np.searchsorted(cols, b)]           # the same product as the others (no rounding apart)
        rank = int(np.sum(s > v) + np.sum((s == v) & (cols < b)))
        best = rank if best is None else min(best, rank)
    return best


def screen_pairs_hierarchical(spec, spec_c, centres, sep_cos, partners, levels, min_valid_fraction=0.5, mmax=0,
                              memory_gb=4.0, dim=None, threads=1):
    """The pairs of one radius that the fast search scans exactly, by the coarse-to-fine screen with the
    coarse rings ``spec_c`` (same radius, the grid ``levels`` coarser): (i, j), i < j, sorted."""
    nside = hp.npix2nside(centres.shape[0])
    coarse, parent, cover, radius = coarse_grid(nside, levels)
    use = usable_rings(spec, min_valid_fraction)
    F = screen_vectors(spec, use, mmax, dim)
    use_c = coarse_use(use, cover, spec_c)
    Fc = screen_vectors(spec_c, use_c, mmax, dim)
    return hierarchical_pairs(F, centres, use, Fc, coarse, use_c, cover, radius, sep_cos, partners,
                              memory_gb, threads)


# --------------------------------------------------------------------------- survival of known pairs
def partner_rank(F, centres, sep_cos, i, j, use=None):
    """Rank of j among the partners of i by screen score (0 = best), within the separation range."""
    lo, hi = sep_cos
    s = F @ F[i]
    d = centres @ centres[i]
    ok = (d >= lo - SEP_TOL) & (d <= hi + SEP_TOL)
    ok[i] = False
    if use is not None:
        ok &= use
    s = np.where(ok, s, -np.inf)
    v = s[j]
    # ties are broken by lower column index, as in the selection
    return int(np.sum(s > v) + np.sum((s == v) & (np.arange(s.size) < j)))


def pair_rank(F, centres, sep_cos, i, j, use=None):
    """Screen rank of the pair (i, j): the better of the two ends (it survives when this is < K)."""
    return min(partner_rank(F, centres, sep_cos, i, j, use), partner_rank(F, centres, sep_cos, j, i, use))


def survival_rate(ranks, partners):
    """Fraction of pairs with screen rank below ``partners`` (nan without pairs)."""
    r = np.asarray(ranks)
    return float(np.mean(r < partners)) if r.size else float("nan")


def describe(nside_centers, partners, levels=0):
    """What the screen is, with the survival measured on the reference campaign (for summaries): the
    coarse-to-fine campaign (nside_centers 64) when ``levels`` > 0, else the single-level campaigns at the
    nside_centers nearest this one (16, 32 or 64)."""
    out = dict(statistic="correlation of |m|-weighted amplitude and bispectrum features (twist and sense invariant)",
               partners=int(partners), levels=int(levels), triple_dim=TRIPLE_DIM, amplitude_share=AMPLITUDE_SHARE,
               band_fraction=BAND_FRACTION, screen_survival=None, screen_survival_basis=None)
    hier = REFERENCE_CAMPAIGN_HIERARCHY
    refs = {k: (v, REFERENCE_CAMPAIGN) for k, v in REFERENCE_CAMPAIGN.get("ranks", {}).items()}
    refs[hier["nside_centers"]] = (hier["single_level_ranks"], hier)
    if levels > 0:
        measured = sorted(hier["ranks"])
        k_ref = min((k for k in measured if k >= partners), default=measured[-1])
        counts, near, camp = hier["ranks"][k_ref], hier["nside_centers"], hier
    else:
        near = min(refs, key=lambda k: (abs(math.log2(k) - math.log2(max(1, nside_centers))), k))
        counts, camp = refs[near]
    total = sum(counts.values())
    kept = sum(c for r, c in counts.items() if r is not None and r < partners)
    dropped = counts.get(None, 0)                 # dropped at the coarse level
    out["screen_survival"] = kept / total
    out["screen_survival_basis"] = (f"{total} injected pairs detected by the exhaustive search "
                                    f"(best grid S > {camp['s_min']}) at nside_centers {near}, K = {int(partners)}, worst rank "
                                    f"{max(r for r in counts if r is not None)}"
                                    + (f", {dropped} dropped at the coarse level" if dropped else "") + ": "
                                    + camp["campaign"])
    return out
