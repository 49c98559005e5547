"""The twist-invariant screen (pipeline/screen.py) and the fast general search built on it."""
from __future__ import annotations

import math
import types

import numpy as np
import healpy as hp
import pytest

from conftest import periodic_field_on_sphere, prepared_from_map
from twinring import rings, screen, search
from twinring.config import ComputeSection, SearchSection
from twinring.statistic import ring_spectra, scan_pairs


# --------------------------------------------------------------------------- helpers
def _random_rings(rng, n, nsamp, mtop):
    """Band-limited random rings (n, nsamp): Fourier modes 1..mtop with a falling spectrum."""
    a = np.zeros((n, nsamp // 2 + 1), complex)
    m = np.arange(1, mtop + 1)
    a[:, 1:mtop + 1] = (rng.normal(size=(n, mtop)) + 1j * rng.normal(size=(n, mtop))) / m
    return np.fft.irfft(a, n=nsamp, axis=-1), a


def _turned(a, nsamp, beta, reverse):
    """Ring T(phi + beta), or T(beta - phi) when ``reverse``, from its rfft coefficients."""
    m = np.arange(a.shape[1])
    b = np.conj(a) if reverse else a
    return np.fft.irfft(b * np.exp(1j * m * beta)[None, :], n=nsamp, axis=-1)


def _predicted(elements, observer, rotation=None):
    """Matched circles (c1, c2, radius_deg), chi = 1: cos(alpha) = d/2, d = |g x0 - x0|, centres along
    g x0 - x0 and g^-1 x0 - x0 (Cornish, Spergel & Starkman 1998, CQG 15, 2657)."""
    x0 = np.asarray(observer, float)
    R0 = np.eye(3) if rotation is None else np.asarray(rotation)
    out = []
    for R, t in elements:
        gx, gix = R @ x0 + t, R.T @ (x0 - t)
        d = np.linalg.norm(gx - x0)
        if not 0 < d < 2:
            continue
        n1, n2 = R0.T @ ((gx - x0) / d), R0.T @ ((gix - x0) / d)
        if not any(np.allclose(n1, o[1]) and np.allclose(n2, o[0]) for o in out):
            out.append((n1, n2, math.degrees(math.acos(d / 2))))
    return out


def _torus_elements(L):
    return [(np.eye(3), np.array([a, b, c], float) * np.asarray(L, float))
            for a in range(-2, 3) for b in range(-2, 3) for c in range(-2, 3) if (a, b, c) != (0, 0, 0)]


def _half_turn_elements(L):
    L = np.asarray(L, float)
    R = np.diag([-1.0, -1.0, 1.0])
    return _torus_elements(L) + [(R, np.array([a * L[0], b * L[1], L[2] / 2 + k * L[2]]))
                                 for a in range(-2, 3) for b in range(-2, 3) for k in range(-2, 2)]


def _rotation(rng):
    q, r = np.linalg.qr(rng.normal(size=(3, 3)))
    q = q * np.sign(np.diag(r))
    if np.linalg.det(q) < 0:
        q[:, 0] = -q[:, 0]
    return q


def _both(prepared, levels=(0,), **kw):
    """Both methods on one sky; the fast one thresholds its score blocks in tiles of 500 columns (so the
    3072 centres of nside_centers 16 span several tiles) on two threads, once per number of coarse levels
    in ``levels`` (keys 'fast' for 0, 'fast1' for one coarse level, ...)."""
    out = {}
    for method in ("exhaustive",) + tuple("fast" + (str(L) if L else "") for L in levels):
        if method.startswith("fast"):
            scfg = SearchSection(family="general", method="fast", screen_levels=int(method[4:] or 0), **kw)
            monkey = pytest.MonkeyPatch()
            monkey.setattr(screen, "TILE_COLS", 500)
            try:
                plan, pool, cand, peaks = search.run_search(prepared, scfg, ComputeSection(threads=2))
            finally:
                monkey.undo()
            assert plan.threads == 2
        else:
            scfg = SearchSection(family="general", method=method, **kw)
            plan, pool, cand, peaks = search.run_search(prepared, scfg)
        out[method] = (plan, pool, cand)
    return out


def _assert_same_top(exh, fast, pred, grid_deg, s_min=0.6):
    """The exhaustive table down to its last candidate that is a predicted pair (s > s_min) reappears in
    the fast table, row for row: same pairs, radii, twist, sense and s to 1e-6.  Below that, chance
    pairs the screen discarded may differ.  Returns those rows."""
    true_rows = [q for q, r in enumerate(exh) if r["s"] > s_min
                 and any(_found([r], c1, c2, a, grid_deg, s_min) for c1, c2, a in pred)]
    assert true_rows
    last = max(true_rows)
    assert len(fast) > last
    for q in range(last + 1):
        r, o = exh[q], fast[q]
        assert bool(o["flip"]) == bool(r["flip"]), q
        for col in ("radius_deg", "lon1_deg", "lat1_deg", "lon2_deg", "lat2_deg", "twist_deg", "s"):
            assert abs(float(o[col]) - float(r[col])) <= 1e-6, (q, col, float(o[col]), float(r[col]))
    return [exh[q] for q in range(last + 1)]


def _found(cand, c1, c2, radius, grid_deg, s_min=0.6):
    """A candidate with s > s_min within 1.5 grid spacings of both centres (either order), radius within 2 deg."""
    for r in cand:
        if r["s"] <= s_min or abs(r["radius_deg"] - radius) > 2.0:
            continue
        a = rings.lonlat_to_vec(r["lon1_deg"], r["lat1_deg"])
        b = rings.lonlat_to_vec(r["lon2_deg"], r["lat2_deg"])
        d1 = max(rings.separation_deg(a, c1), rings.separation_deg(b, c2))
        d2 = max(rings.separation_deg(a, c2), rings.separation_deg(b, c1))
        if min(d1, d2) <= 1.5 * grid_deg:
            return True
    return False


# --------------------------------------------------------------------------- the statistic
def test_features_do_not_depend_on_twist_or_sense():
    # The power spectrum and the bispectrum b_m b_n conj(b_{m+n}) of a periodic sequence are unchanged
    # by a shift, and a reversal conjugates the coefficients (common practice, no source); the screen
    # uses |b_m| and Re of the bispectrum, so both leave its features unchanged.
    rng = np.random.default_rng(3)
    nsamp = 128
    vals, a = _random_rings(rng, 60, nsamp, 40)
    f0 = screen.screen_features(ring_spectra(vals))
    for beta, reverse in ((0.37, False), (2.1, True), (5.0, True)):
        f1 = screen.screen_features(ring_spectra(_turned(a, nsamp, beta, reverse)))
        np.testing.assert_allclose(f1, f0, atol=2e-5)
    # unit rows, and unrelated rings are far from matched ones
    np.testing.assert_allclose(np.linalg.norm(f0, axis=1), 1.0, atol=1e-5)
    c = f0 @ f0.T
    assert np.max(np.abs(c[~np.eye(60, dtype=bool)])) < 0.5


def test_a_noisy_copy_outranks_unrelated_rings():
    # A ring seen twice (turned, reversed, with 30% independent noise) must be its own best partner
    # among unrelated rings: a matched pair shares its invariants (Cornish, Spergel & Starkman 1998).
    rng = np.random.default_rng(4)
    nsamp = 192
    n = 400
    vals, a = _random_rings(rng, n, nsamp, 70)
    noise, _ = _random_rings(rng, n, nsamp, 70)
    twin = _turned(a, nsamp, 1.3, True) + 0.3 * noise
    spec = ring_spectra(np.concatenate([vals, twin]))
    F = screen.screen_features(spec)
    c = F[:n] @ F[n:].T
    assert np.mean(np.argmax(c, axis=1) == np.arange(n)) >= 0.99


def test_top_partners_equals_brute_force():
    # Definition of the selection (common practice, no source): each usable centre keeps its K best
    # partners within the separation range (ties to the lower index); a pair survives if either end keeps it.
    rng = np.random.default_rng(5)
    for nsc, sep, K in ((8, (10.0, 180.0), 5), (16, (10.0, 180.0), 64), (16, (30.0, 60.0), 7)):
        cen = rings.center_grid(nsc)
        n = cen.shape[0]
        F = rng.normal(size=(n, 24)).astype(np.float32)
        F /= np.linalg.norm(F, axis=1, keepdims=True)
        use = rng.random(n) > 0.1
        sep_cos = (math.cos(math.radians(sep[1])), math.cos(math.radians(sep[0])))
        ref = _brute_top(F, cen, sep_cos, K, use)
        for mem, threads, tile in ((4.0, 1, 4096), (0.002, 1, 4096), (4.0, 2, 64), (0.002, 2, 37)):
            # blocking by memory, tiles of a block and threads must not change the answer
            monkey = pytest.MonkeyPatch()
            monkey.setattr(screen, "TILE_COLS", tile)
            try:
                i, j = screen.top_partners(F, cen, sep_cos, K, use, memory_gb=mem, threads=threads)
            finally:
                monkey.undo()
            assert np.all(i < j)
            assert set(zip(i.tolist(), j.tolist())) == ref


def _brute_top(F, cen, sep_cos, K, use):
    """The selection rule written out (common practice, no source): per usable centre, its K best usable
    partners within the separation range (ties to the lower index), in float64; either end keeps a pair."""
    C = F.astype(np.float64) @ F.T.astype(np.float64)
    D = cen @ cen.T
    ok = (D >= sep_cos[0] - 1e-12) & (D <= sep_cos[1] + 1e-12) & use[None, :] & use[:, None]
    np.fill_diagonal(ok, False)
    ref = set()
    for i in np.flatnonzero(use):
        cand = np.flatnonzero(ok[i])
        for j in cand[np.lexsort((cand, -C[i, cand]))[:K]]:
            ref.add((min(i, j), max(i, j)))
    return ref


def test_top_partners_on_sky_features_equals_brute_force(torus_sky):
    # Real screen vectors, where neighbouring centres' overlapping rings score high and fall in the
    # excluded disc: masked (|b| < 25 deg band, so some rings are unusable) and unmasked, two separation
    # ranges, tiles narrower than a block and two threads.  Scores in float32 (the screen's) may order two
    # nearly equal partners differently from float64: at most a few pairs may differ, none near the top.
    nside = 64
    theta, _ = hp.pix2ang(nside, np.arange(hp.nside2npix(nside)))
    band = (np.abs(90.0 - np.degrees(theta)) >= 25.0).astype(float)
    for mask, sep in ((None, (10.0, 180.0)), (band, (10.0, 180.0)), (band, (20.0, 150.0))):
        prepared = types.SimpleNamespace(**{**vars(torus_sky), "mask": mask})
        scfg = SearchSection(family="general", method="fast", nside_centers=16, radius_deg=(32.0, 32.0, 1.0),
                             separation_deg=sep)
        plan = search.make_plan(prepared, scfg)
        spec = search.ring_set(plan, 0)
        use = screen.usable_rings(spec, plan.min_valid_fraction)
        assert (mask is None) == bool(use.all())
        F = screen.screen_vectors(spec, use, plan.screen_mmax)
        K = 24
        ref = _brute_top(F, plan.centres, plan.sep_cos, K, use)
        monkey = pytest.MonkeyPatch()
        monkey.setattr(screen, "TILE_COLS", 300)
        try:
            i, j = screen.top_partners(F, plan.centres, plan.sep_cos, K, use, memory_gb=0.01, threads=2)
        finally:
            monkey.undo()
        got = set(zip(i.tolist(), j.tolist()))
        assert np.all(i < j) and use[i].all() and use[j].all()
        assert len(got ^ ref) <= 4, len(got ^ ref)
        search.clear_ring_caches()


def test_rings_too_masked_for_the_kernel_are_not_screened():
    # A pair is skipped when fewer than min_valid_fraction of the samples are valid on both circles
    # (common practice, no source): a ring below that fraction by itself can never be scanned.
    rng = np.random.default_rng(6)
    vals, _ = _random_rings(rng, 4, 64, 20)
    u = np.ones_like(vals)
    u[1, :40] = 0          # 24 of 64 valid: below one half
    u[2, :20] = 0          # 44 of 64 valid
    spec = ring_spectra(vals, u)
    use = screen.usable_rings(spec, 0.5)
    assert use.tolist() == [True, False, True, True]
    s, _ = scan_pairs(spec, np.array([1, 1, 1]), spec, np.array([0, 2, 3]), 0.5)
    assert np.all(np.isneginf(s))


# --------------------------------------------------------------------------- fast equals exhaustive
def test_fast_equals_exhaustive_on_a_torus(torus_sky):
    # Cubic torus of side L = 1.2 (chi = 1): 3 face pairs at cos(alpha) = L/2 (53.1 deg) and 6 edge pairs
    # at cos(alpha) = L sqrt(2)/2 (31.9 deg), all back-to-back (Cornish, Spergel & Starkman 1998).
    res = _both(torus_sky, nside_centers=16, radius_deg=(32.0, 53.0, 21.0), top=12)
    plan_e, pool_e, exh = res["exhaustive"]
    plan_f, pool_f, fast = res["fast"]
    assert pool_f.pairs_scanned < 0.05 * pool_e.pairs_scanned
    pred = _predicted(_torus_elements((1.2, 1.2, 1.2)), (0, 0, 0))
    assert len(pred) == 9
    top = _assert_same_top(exh, fast, pred, plan_f.grid_deg)
    # all nine pass the screen; one edge pair sits badly on this coarse grid (grid S 0.67, below the
    # best chance pairs) and is not among the few refined, by either method
    kr = search.known_pair_ranks(plan_f, pred, s_min=0.6)
    assert len(kr) == 9 and max(k["rank"] for k in kr) < plan_f.screen_partners
    assert sum(_found(top, c1, c2, a, plan_f.grid_deg) for c1, c2, a in pred) >= 8


def test_fast_equals_exhaustive_on_a_half_turn_space_off_axis():
    # E2 (half turn about z with translation Lz/2) seen from off its axis: the half turn pairs circles
    # that are not back-to-back, its square (a translation by Lz) a back-to-back pair (Riazuelo et al.
    # 2004, PRD 69, 103518; circle radii from cos(alpha) = d/2, Cornish, Spergel & Starkman 1998).
    lengths, obs = (2.5, 2.5, 1.6), (0.3, 0.2, 0.1)
    m = periodic_field_on_sphere(lengths, 64, kmax=140, seed=12, observer=obs, half_turn=True)
    prepared = prepared_from_map(m, 128, 3.0)
    pred = _predicted(_half_turn_elements(lengths), obs)
    pred = [p for p in pred if 30 < p[2] < 60]
    assert sorted(round(p[2], 1) for p in pred) == [36.9, 57.4]
    assert any(rings.separation_deg(p[0], p[1]) < 120 for p in pred)      # one pair is not back-to-back
    res = _both(prepared, nside_centers=16, radius_deg=(37.0, 57.0, 20.0), top=8)
    plan_f, pool_f, fast = res["fast"]
    top = _assert_same_top(res["exhaustive"][2], fast, pred, plan_f.grid_deg)
    for c1, c2, a in pred:
        assert _found(top, c1, c2, a, plan_f.grid_deg), a


def test_fast_equals_exhaustive_on_a_masked_sky(torus_sky):
    # Galactic-band style mask |b| < 10 deg: the masked S uses only samples valid on both circles
    # (Aurich et al., astro-ph/0511726); the torus edge pairs (31.9 deg, CSS 1998) clear of the band
    # stay detectable.  Chance pairs of partly masked rings reach s ~ 0.85 here, so only the rows down
    # to the last true pair are compared.
    nside = 64
    theta, _ = hp.pix2ang(nside, np.arange(hp.nside2npix(nside)))
    mask = (np.abs(90.0 - np.degrees(theta)) >= 10.0).astype(float)
    prepared = types.SimpleNamespace(**{**vars(torus_sky), "mask": mask})
    res = _both(prepared, nside_centers=16, radius_deg=(32.0, 32.0, 1.0), top=10)
    pred = [p for p in _predicted(_torus_elements((1.2, 1.2, 1.2)), (0, 0, 0)) if p[2] < 40]
    plan_f, pool_f, fast = res["fast"]
    assert plan_f.mask is not None
    top = _assert_same_top(res["exhaustive"][2], fast, pred, plan_f.grid_deg)
    hits = sum(_found(top, c1, c2, a, plan_f.grid_deg) for c1, c2, a in pred)
    assert hits >= 3


# --------------------------------------------------------------------------- survival of injected pairs
def test_survival_of_injected_pairs():
    # Small campaign: tori and half-turn spaces of random size, orientation and observer; every pair the
    # exhaustive search detects (best grid-pair S > 0.6 on these noiseless Sachs-Wolfe skies) must pass
    # the screen (>= 99 %), here with K = 16 partners of 3072 centres, a quarter of the default.
    rng = np.random.default_rng(21)
    ranks = []
    for q in range(6):
        kind = "torus" if q % 2 == 0 else "half"
        rot = _rotation(rng)
        if kind == "torus":
            L = rng.uniform(1.1, 1.8)
            lengths = (L, L * rng.uniform(1.0, 1.1), L * rng.uniform(1.0, 1.1))
            obs = rng.uniform(-0.5, 0.5, 3)
            els = _torus_elements(lengths)
        else:
            lengths = (rng.uniform(2.2, 3.0), rng.uniform(2.2, 3.0), rng.uniform(1.0, 1.8))
            obs = np.array([*rng.uniform(-0.4, 0.4, 2), 0.0])
            els = _half_turn_elements(lengths)
        m = periodic_field_on_sphere(lengths, 64, kmax=140, seed=int(rng.integers(1 << 30)), rotation=rot,
                                     observer=obs, half_turn=(kind == "half"))
        prepared = prepared_from_map(m, 128, 3.0)
        scfg = SearchSection(family="general", method="fast", nside_centers=16, radius_deg=(20.0, 60.0, 2.0),
                             screen_partners=16)
        plan = search.make_plan(prepared, scfg)
        kr = search.known_pair_ranks(plan, _predicted(els, obs, rot), s_min=0.6)
        ranks += [k["rank"] for k in kr]
    assert len(ranks) >= 15
    assert screen.survival_rate(ranks, 16) >= 0.99


def test_reduced_screen_vectors_keep_inner_products_of_their_span():
    # principal directions (numpy's SVD as the reference): vectors lying in a dim-dimensional subspace keep
    # every inner product when projected on dim leading directions; fewer directions keep the largest part
    rng = np.random.default_rng(8)
    basis = np.linalg.qr(rng.normal(size=(40, 6)))[0]
    F = (rng.normal(size=(300, 6)) @ basis.T).astype(np.float32)
    F /= np.linalg.norm(F, axis=1, keepdims=True)
    G = screen.reduce_features(F, dim=6)
    assert G.shape == (300, 6)
    np.testing.assert_allclose(G @ G.T, F @ F.T, atol=1e-5)
    _, sv, vt = np.linalg.svd(F.astype(np.float64), full_matrices=False)
    G3 = screen.reduce_features(F, dim=3)
    ref = F.astype(np.float64) @ vt[:3].T
    ref /= np.linalg.norm(ref, axis=1, keepdims=True)
    np.testing.assert_allclose(G3 @ G3.T, ref @ ref.T, atol=1e-5)
    assert screen.reduce_features(F, dim=0) is F and screen.reduce_features(F, dim=40) is F


# --------------------------------------------------------------------------- coarse to fine
def test_coarse_grid_is_the_nested_parent_grid():
    # HEALPix nesting (Gorski et al. 2005, ApJ 622, 759): every pixel of Nside n lies inside one pixel of
    # Nside n/2^L, which has 4^L such children; healpy's vec2pix at the coarse Nside finds the parent.  A
    # coarse centre covers its children and every fine centre within the cover radius.
    for nside, levels in ((16, 1), (16, 2), (8, 3)):
        coarse, parent, cover, radius = screen.coarse_grid(nside, levels)
        fine = rings.center_grid(nside)
        n, nc = fine.shape[0], nside >> levels
        assert coarse.shape == (hp.nside2npix(nc), 3)
        assert np.array_equal(parent, hp.vec2pix(nc, fine[:, 0], fine[:, 1], fine[:, 2]))
        child_angle = np.arccos(np.clip(np.sum(fine * coarse[parent], axis=1), -1, 1))
        assert radius == pytest.approx(screen.COVER_FACTOR * child_angle.max())
        D = fine @ coarse.T
        for a in range(coarse.shape[0]):
            got = set(cover[a][cover[a] < n].tolist())
            want = set(np.flatnonzero(D[:, a] >= math.cos(radius) - 1e-12).tolist()) | set(np.flatnonzero(parent == a).tolist())
            assert got == want, a
        assert np.all(cover[cover < n].size >= n)


def test_widened_range_holds_every_allowed_pair_s_parents():
    # triangle inequality on the sphere (common practice, no source): parents lie within the largest
    # child-parent angle of their children, so a fine pair's parents are within twice it of its separation
    # cover radius of the coarse centres: the coarse pairs covering an allowed fine pair are in range
    nside, levels = 16, 1
    coarse, parent, cover, radius = screen.coarse_grid(nside, levels)
    fine = rings.center_grid(nside)
    n = fine.shape[0]
    a_of = [np.flatnonzero(np.any(cover == i, axis=1)) for i in range(n)]
    D = fine @ fine.T
    for sep in ((10.0, 180.0), (30.0, 60.0), (100.0, 170.0)):
        sep_cos = (math.cos(math.radians(sep[1])), math.cos(math.radians(sep[0])))
        lo, hi = screen.widened_sep_cos(sep_cos, 2 * radius)
        i, j = np.nonzero((D >= sep_cos[0]) & (D <= sep_cos[1]))
        for q in range(0, i.size, 97):
            dc = coarse[a_of[i[q]]] @ coarse[a_of[j[q]]].T
            assert np.all((dc >= lo - 1e-12) & (dc <= hi + 1e-12))
        assert lo < sep_cos[0] or sep[1] == 180.0


def _brute_hierarchy(F, cen, Fc, cen_c, cover, radius, sep_cos, K, use, use_c):
    """The coarse-to-fine rule written out in float64 (common practice, no source): coarse centres keep
    their K best coarse partners in the widened range (either end); a fine centre's candidates are the
    fine centres covered by the kept partners of the coarse centres covering it, and by those coarse
    centres; each usable fine centre keeps its K best usable candidates in the separation range; either
    end keeps a pair."""
    kept = _brute_top(Fc, cen_c, screen.widened_sep_cos(sep_cos, 2 * radius), K, use_c)
    nc, n = cen_c.shape[0], cen.shape[0]
    adj = [{a} for a in range(nc)]
    for a, b in kept:
        adj[a].add(b); adj[b].add(a)
    C = F.astype(np.float64) @ F.T.astype(np.float64)
    D = cen @ cen.T
    ref = set()
    for i in np.flatnonzero(use):
        over = np.flatnonzero(np.any(cover == i, axis=1))
        cand = np.unique(np.concatenate([cover[b] for a in over for b in adj[a]]))
        cand = cand[cand < n]
        cand = cand[(cand != i) & use[cand] & (D[i, cand] >= sep_cos[0] - 1e-12) & (D[i, cand] <= sep_cos[1] + 1e-12)]
        for j in cand[np.lexsort((cand, -C[i, cand]))[:K]]:
            ref.add((min(i, j), max(i, j)))
    return ref


def test_hierarchical_pairs_equal_the_rule_written_out():
    rng = np.random.default_rng(9)
    nside = 8
    coarse, parent, cover, radius = screen.coarse_grid(nside, 1)
    cen = rings.center_grid(nside)
    n, nc = cen.shape[0], coarse.shape[0]
    for sep, K, threads, mem in (((10.0, 180.0), 6, 1, 4.0), ((30.0, 90.0), 12, 2, 4.0), ((10.0, 180.0), 3, 2, 1e-4)):
        F = rng.normal(size=(n, 16)).astype(np.float32)
        F /= np.linalg.norm(F, axis=1, keepdims=True)
        Fc = rng.normal(size=(nc, 16)).astype(np.float32)
        Fc /= np.linalg.norm(Fc, axis=1, keepdims=True)
        use = rng.random(n) > 0.1
        use_c = np.concatenate([use, [False]])[cover].any(axis=1)
        sep_cos = (math.cos(math.radians(sep[1])), math.cos(math.radians(sep[0])))
        ref = _brute_hierarchy(F, cen, Fc, coarse, cover, radius, sep_cos, K, use, use_c)
        i, j = screen.hierarchical_pairs(F, cen, use, Fc, coarse, use_c, cover, radius, sep_cos, K, mem, threads)
        assert np.all(i < j) and use[i].all() and use[j].all()
        assert set(zip(i.tolist(), j.tolist())) == ref
        # the survivors are a subset of the exhaustive pair set (same inclusive range test)
        d = np.sum(cen[i] * cen[j], axis=1)
        assert np.all((d >= sep_cos[0] - 1e-12) & (d <= sep_cos[1] + 1e-12))


def test_hierarchy_keeping_every_coarse_partner_is_the_single_level_screen():
    # with K at least the number of coarse centres every allowed fine pair is a candidate, and the rule
    # reduces to the single-level one (each centre's K best partners, written out in _brute_top)
    rng = np.random.default_rng(10)
    nside = 8
    coarse, parent, cover, radius = screen.coarse_grid(nside, 1)
    cen = rings.center_grid(nside)
    F = rng.normal(size=(cen.shape[0], 16)).astype(np.float32)
    F /= np.linalg.norm(F, axis=1, keepdims=True)
    Fc = rng.normal(size=(coarse.shape[0], 16)).astype(np.float32)
    use = np.ones(cen.shape[0], bool)
    sep_cos = (math.cos(math.radians(170.0)), math.cos(math.radians(20.0)))
    K = coarse.shape[0]
    i, j = screen.hierarchical_pairs(F, cen, use, Fc, coarse, np.ones(coarse.shape[0], bool), cover, radius, sep_cos, K)
    assert set(zip(i.tolist(), j.tolist())) == _brute_top(F, cen, sep_cos, K, use)


# The coarse-to-fine screen against the exhaustive search at nside_centers 32 (coarse grid Nside 16, 3.7 deg;
# a coarse grid of Nside 8, 7.3 deg, is too coarse for these 3 deg-beam skies: measured, the fast search then
# loses grid pairs of S 0.6-0.7 that the exhaustive one lists, see twinring.screen).  Narrow separation
# windows about the predicted pairs keep the exhaustive search small.
def test_hierarchical_fast_equals_exhaustive_on_a_torus(torus_sky):
    # cubic torus, side 1.2: face pairs at 53.1 deg and edge pairs at 31.9 deg, back to back (CSS 1998)
    res = _both(torus_sky, levels=(0, 1), nside_centers=32, radius_deg=(32.0, 53.0, 21.0),
                separation_deg=(165.0, 180.0), top=12, screen_partners=16)
    plan_e, pool_e, exh = res["exhaustive"]
    pred = _predicted(_torus_elements((1.2, 1.2, 1.2)), (0, 0, 0))
    top = _assert_same_top(exh, res["fast"][2], pred, plan_e.grid_deg)
    plan_h, pool_h, hier = res["fast1"]
    assert plan_h.screen_levels == 1 and res["fast"][0].screen_levels == 0
    assert pool_h.pairs_scanned < 0.5 * pool_e.pairs_scanned
    assert _assert_same_top(exh, hier, pred, plan_h.grid_deg) == top
    kr = search.known_pair_ranks(plan_h, pred, s_min=0.6)
    assert len(kr) == 9
    assert all(k["hier_rank"][16] is not None and k["hier_rank"][16] < 16 for k in kr)


def test_hierarchical_fast_equals_exhaustive_on_a_half_turn_space_off_axis():
    # E2 off its axis: the half turn pairs circles of 57.4 deg 95.9 deg apart (Riazuelo et al. 2004, PRD 69,
    # 103518; radii from CSS 1998)
    lengths, obs = (2.5, 2.5, 1.6), (0.3, 0.2, 0.1)
    m = periodic_field_on_sphere(lengths, 64, kmax=140, seed=12, observer=obs, half_turn=True)
    prepared = prepared_from_map(m, 128, 3.0)
    pred = [p for p in _predicted(_half_turn_elements(lengths), obs) if 50 < p[2] < 60]
    assert len(pred) == 1 and abs(rings.separation_deg(pred[0][0], pred[0][1]) - 95.9) < 0.1
    res = _both(prepared, levels=(1,), nside_centers=32, radius_deg=(57.0, 57.0, 1.0), separation_deg=(94.0, 98.0),
                top=5, screen_partners=16)
    plan_h, pool_h, hier = res["fast1"]
    assert pool_h.pairs_scanned < 0.5 * res["exhaustive"][1].pairs_scanned
    top = _assert_same_top(res["exhaustive"][2], hier, pred, plan_h.grid_deg)
    assert _found(top, *pred[0], plan_h.grid_deg)


def test_hierarchical_fast_equals_exhaustive_on_a_masked_sky(torus_sky):
    # |b| < 10 deg masked (Aurich et al., astro-ph/0511726): rings about coarse and fine centres alike are
    # masked, unusable fine rings take part in no pair; the edge pairs clear of the band stay detectable
    nside = 64
    theta, _ = hp.pix2ang(nside, np.arange(hp.nside2npix(nside)))
    mask = (np.abs(90.0 - np.degrees(theta)) >= 10.0).astype(float)
    prepared = types.SimpleNamespace(**{**vars(torus_sky), "mask": mask})
    res = _both(prepared, levels=(1,), nside_centers=32, radius_deg=(32.0, 32.0, 1.0), separation_deg=(165.0, 180.0),
                top=10, screen_partners=16)
    plan_h, pool_h, hier = res["fast1"]
    assert plan_h.mask is not None
    pred = [p for p in _predicted(_torus_elements((1.2, 1.2, 1.2)), (0, 0, 0)) if p[2] < 40]
    top = _assert_same_top(res["exhaustive"][2], hier, pred, plan_h.grid_deg)
    assert sum(_found(top, c1, c2, a, plan_h.grid_deg) for c1, c2, a in pred) >= 3


def test_screen_defaults_follow_the_grid():
    # null keys: one coarse level and K = 16 from nside_centers 64 on (where REFERENCE_CAMPAIGN_HIERARCHY
    # measured survival), the single-level screen with K = 64 below; explicit keys win
    from twinring.config import config_from_dict

    def setup(**search):
        cfg = config_from_dict({"search": {"family": "general", "method": "fast", **search}})
        return cfg.search.screen_setup()

    assert setup(nside_centers=64) == (16, 1)
    assert setup(nside_centers=128) == (16, 1)
    assert setup(nside_centers=32) == (64, 0)
    assert setup(nside_centers=64, screen_levels=0) == (16, 0)
    assert setup(nside_centers=64, screen_partners=64, screen_levels=2) == (64, 2)
    assert setup(nside_centers=16, screen_levels=1) == (64, 1)
    ref = screen.REFERENCE_CAMPAIGN_HIERARCHY
    worst = max(r for r in ref["ranks"][16] if r is not None)
    assert worst < 16 and ref["nside_centers"] == 64
    d = screen.describe(64, 16, 1)
    assert d["levels"] == 1 and d["screen_survival"] >= 0.99
    n = sum(ref["ranks"][16].values())
    assert d["screen_survival_basis"].startswith(f"{n} injected pairs") and "K = 16" in d["screen_survival_basis"]
    # a K below the worst measured rank is reported as losing pairs
    assert screen.describe(64, worst, 1)["screen_survival"] < 1.0
