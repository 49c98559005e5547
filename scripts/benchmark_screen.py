#!/usr/bin/env python
"""Benchmark of the screened general search (search.method: fast) against the exhaustive one.

Default run: one prepared sky with matched circles (a half-turn space E2 seen off its axis:
a back-to-back pair from the translation g^2 and a pair that is not back-to-back from the
half-turn itself), Nside 64, lmax 128, 3 deg beam; the same general search (nside_centers 32,
radii 20-60 deg step 2, separations 10-180 deg) by both methods in one run.  Prints both wall
times, whether both found the same top candidates (every exhaustive candidate with s above
--s-min, with the same pairs, radii, twist, sense and s to 1e-6), the projected wall time of the
full search at nside_centers 64, radii 10-90 deg step 1 for both methods (how: see the printed
lines), and as its last line ``speedup: X`` (exhaustive wall time / fast wall time, whole search
including refinement).

``--campaign N``: instead, the survival of injected pairs through the screen on N torus and N
half-turn skies (random sizes, rotations and observers) at the given nside_centers values:
for every injected pair that the exhaustive search detects (best grid-pair S above --s-min),
the screen rank of that grid pair (twinring.search.known_pair_ranks); survival at K partners is
the fraction with rank < K.

    nohup python scripts/benchmark_screen.py > /tmp/bench_screen.log 2>&1 &
    python scripts/benchmark_screen.py --campaign 12 --campaign-nside 16 32 64
"""
from __future__ import annotations

import argparse
import json
import math
import os
import sys
import time
import warnings

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(os.path.dirname(HERE), "tests"))

from twinring import rings, screen, search  # noqa: E402
from twinring.config import ComputeSection, SearchSection  # noqa: E402
from twinring.statistic import ring_spectra, scan_pairs  # noqa: E402

warnings.filterwarnings("ignore", category=RuntimeWarning)


# --------------------------------------------------------------------------- skies with known circles
def _rotation(rng):
    """A uniformly random rotation matrix (QR of a Gaussian matrix, sign-fixed)."""
    q, r = np.linalg.qr(rng.normal(size=(3, 3)))
    q = q * np.sign(np.diag(r))
    if np.linalg.det(q) < 0:
        q[:, 0] = -q[:, 0]
    return q


def torus_elements(lengths, reach=2):
    els = []
    L = np.asarray(lengths, float)
    for a in range(-reach, reach + 1):
        for b in range(-reach, reach + 1):
            for c in range(-reach, reach + 1):
                if (a, b, c) != (0, 0, 0):
                    els.append((np.eye(3), np.array([a, b, c]) * L))
    return els


def half_turn_elements(lengths, reach=2):
    """(x, y, z) -> (-x, -y, z + Lz/2) and its compositions with the cover-torus translations."""
    L = np.asarray(lengths, float)
    els = torus_elements(L, reach)
    R = np.diag([-1.0, -1.0, 1.0])
    for a in range(-reach, reach + 1):
        for b in range(-reach, reach + 1):
            for k in range(-reach, reach):
                els.append((R, np.array([a * L[0], b * L[1], L[2] / 2 + k * L[2]])))
    return els


def circle_pairs(elements, observer, rotation):
    """Matched circles (c1, c2, radius_deg) in sky coordinates, chi = 1: cos(alpha) = d / 2 with
    d = |g x0 - x0|, centres along g x0 - x0 and g^-1 x0 - x0 (Cornish, Spergel & Starkman 1998)."""
    x0 = np.asarray(observer, float)
    out = []
    for R, t in elements:
        gx = R @ x0 + t
        gix = R.T @ (x0 - t)
        d = np.linalg.norm(gx - x0)
        if not 0 < d < 2:
            continue
        n1 = rotation.T @ ((gx - x0) / d)
        n2 = rotation.T @ ((gix - x0) / d)
        if any(np.allclose(n1, o[1]) and np.allclose(n2, o[0]) for o in out):
            continue          # g^-1 gives the same physical pair
        out.append((n1, n2, math.degrees(math.acos(d / 2))))
    return out


def make_sky(kind, lengths, observer, rotation, seed, nside=64, lmax=128, fwhm=3.0):
    from conftest import periodic_field_on_sphere, prepared_from_map

    m = periodic_field_on_sphere(lengths, nside, kmax=140, seed=seed, rotation=rotation, observer=observer,
                                 half_turn=(kind == "half"))
    els = half_turn_elements(lengths) if kind == "half" else torus_elements(lengths)
    return prepared_from_map(m, lmax, fwhm), circle_pairs(els, observer, rotation)


def campaign_skies(n, seed):
    rng = np.random.default_rng(seed)
    out = []
    for q in range(n):
        L = rng.uniform(1.0, 1.85)
        lengths = (L, L * rng.uniform(1.0, 1.15), L * rng.uniform(1.0, 1.15))
        out.append(("torus", lengths, rng.uniform(-0.5, 0.5, 3), _rotation(rng), int(rng.integers(1 << 30))))
    for q in range(n):
        lengths = (rng.uniform(2.2, 3.0), rng.uniform(2.2, 3.0), rng.uniform(0.9, 1.9))
        obs = np.array([*rng.uniform(-0.4, 0.4, 2), 0.0])
        out.append(("half", lengths, obs, _rotation(rng), int(rng.integers(1 << 30))))
    return out


# --------------------------------------------------------------------------- timed search
def timed_search(prepared, scfg, compute):
    """The search of twinring.search.run_search, with the time of every chunk recorded."""
    t0 = time.perf_counter()
    plan = search.make_plan(prepared, scfg, compute)
    per_radius = {}
    results = []
    for chunk in plan.chunk_ids():
        ir = chunk[0]
        t = time.perf_counter()
        spec = search.ring_set(plan, ir)
        t_rings = time.perf_counter() - t
        t = time.perf_counter()
        i, j = search._block_pairs(plan, chunk[1], ir)
        t_pairs = time.perf_counter() - t
        t = time.perf_counter()
        res = search.scan_chunk(plan, chunk)   # ring set and screen are cached for this radius
        t_scan = time.perf_counter() - t
        results.append(res)
        d = per_radius.setdefault(ir, dict(rings=0.0, pairs_or_screen=0.0, scan=0.0, pairs=0, nsamp=plan.nsamp[ir]))
        d["rings"] += t_rings
        d["pairs_or_screen"] += t_pairs
        d["scan"] += t_scan
        d["pairs"] += int(i.size)
    t_chunks = time.perf_counter() - t0
    pool = search.combine(plan, results)
    t = time.perf_counter()
    cand, peaks = search.finalize(plan, pool, scfg.top, refine=scfg.refine)
    t_final = time.perf_counter() - t
    return dict(plan=plan, pool=pool, cand=cand, peaks=peaks, per_radius=per_radius, t_chunks=t_chunks,
                t_final=t_final, wall=time.perf_counter() - t0)


# timed_search times the pairs of a chunk (the screen, for fast) apart from the exact scan;
# scan_chunk then asks for the same pairs again: answer from this one-chunk cache, so every
# chunk's pairs are made once, as in an ordinary run
_PAIR_CACHE = {}
_orig_block_pairs = search._block_pairs


def _cached_block_pairs(plan, ib, ir=None):
    if ir is None:
        return _orig_block_pairs(plan, ib, ir)
    key = (id(plan), ib, ir)
    if key not in _PAIR_CACHE:
        _PAIR_CACHE.clear()
        _PAIR_CACHE[key] = _orig_block_pairs(plan, ib, ir)
    return _PAIR_CACHE[key]


def same_candidates(a, b, s_min):
    """Every candidate of ``a`` with s > s_min appears in ``b`` at the same rank with the same values."""
    top = [r for r in a if r["s"] > s_min]
    if len(b) < len(top):
        return False, len(top)
    for q, r in enumerate(top):
        o = b[q]
        if bool(r["flip"]) != bool(o["flip"]):
            return False, len(top)
        for col in ("radius_deg", "lon1_deg", "lat1_deg", "lon2_deg", "lat2_deg", "twist_deg", "s"):
            if abs(float(r[col]) - float(o[col])) > 1e-6:
                return False, len(top)
    return True, len(top)


# --------------------------------------------------------------------------- cost model for nside_centers 64
def pair_cost_model(per_radius):
    """Seconds per exact pair scan as a function of samples per ring: least squares in (N log2 N, 1)."""
    n = np.array([d["nsamp"] for d in per_radius.values()], float)
    t = np.array([d["scan"] / max(d["pairs"], 1) for d in per_radius.values()])
    A = np.stack([n * np.log2(n), np.ones_like(n)], axis=1)
    coef, *_ = np.linalg.lstsq(A, t, rcond=None)
    return lambda N: max(float(coef[0] * N * math.log2(N) + coef[1]), float(t.min()) * 0.5)


def project_full(prepared, compute, pair_cost, partners, sample_radii=(10.0, 30.0, 50.0, 70.0, 90.0)):
    """Projected wall times of the nside_centers 64, radii 10-90 step 1 general search.

    Exhaustive: pairs per radius (all centre pairs 10-180 deg apart) x seconds per pair at that
    radius' ring length (fitted on the measured nside_centers 32 run).  Fast: rings, screen and exact
    scans measured at nside_centers 64 on a few radii and interpolated linearly in radius.
    """
    radii = [10.0 + q for q in range(81)]
    lmax = prepared.lmax
    n64 = 12 * 64 * 64
    sep_cos = (math.cos(math.pi), math.cos(math.radians(10.0)))
    frac = (sep_cos[1] - sep_cos[0]) / 2
    pairs64 = n64 * (n64 - 1) / 2 * frac
    t_exh = sum(pairs64 * pair_cost(rings.samples_for(math.radians(r), lmax)) for r in radii)
    scfg = SearchSection(family="general", method="fast", nside_centers=64, radius_deg=(10.0, 90.0, 1.0),
                         separation_deg=(10.0, 180.0), screen_partners=partners)
    plan = search.make_plan(prepared, scfg, compute)
    screen.excluded_partners(plan.centres, plan.sep_cos)        # one-off per process, timed below
    t = time.perf_counter()
    screen._EXCL_CACHE.clear()
    screen.excluded_partners(plan.centres, plan.sep_cos)
    t_once = time.perf_counter() - t
    rows = []
    for r in sample_radii:
        ir = int(round(r - 10.0))
        t = time.perf_counter()
        spec = search.ring_set(plan, ir)
        t_r = time.perf_counter() - t
        t = time.perf_counter()
        i, j = search._block_pairs(plan, 0, ir)
        t_s = time.perf_counter() - t
        t = time.perf_counter()
        scan_pairs(spec, i, spec, j, plan.min_valid_fraction, workers=plan.threads)
        t_e = time.perf_counter() - t
        rows.append((r, t_r, t_s, t_e, int(i.size)))
        print(f"  nside_centers 64, radius {r:4.0f}: rings {t_r:6.1f} s, screen {t_s:6.1f} s, "
              f"exact {t_e:6.1f} s on {i.size:,} pairs ({i.size / n64:.0f} per centre)", flush=True)
    xs = np.array([x[0] for x in rows])
    per = np.array([x[1] + x[2] + x[3] for x in rows])
    t_fast = float(np.sum(np.interp(radii, xs, per))) + t_once
    return t_exh, t_fast, pairs64, rows, t_once


# --------------------------------------------------------------------------- main modes
def run_benchmark(args):
    search._block_pairs = _cached_block_pairs
    lengths = (2.5, 2.5, 1.6)
    observer = (0.3, 0.2, 0.1)
    rot = _rotation(np.random.default_rng(7))
    prepared, circ = make_sky("half", lengths, observer, rot, seed=12)
    circ = [c for c in circ if args.radii[0] - 2 <= c[2] <= args.radii[1] + 2]
    print(f"sky: half-turn space E2, cover periods {lengths}, observer {observer} (off the axis), Nside 64, "
          f"lmax 128, 3 deg beam; circles in range: " +
          ", ".join(f"radius {a:.1f} deg, separation {rings.separation_deg(c1, c2):.1f} deg" for c1, c2, a in circ))
    compute = ComputeSection(threads=args.threads, memory_gb=args.memory_gb)
    base = dict(family="general", nside_centers=args.nside_centers, radius_deg=tuple(args.radii),
                separation_deg=tuple(args.sep), top=args.top, screen_partners=args.partners)
    print(f"load average at start: {os.getloadavg()}", flush=True)
    out = {}
    for method in ("fast", "exhaustive") if not args.skip_exhaustive else ("fast",):
        scfg = SearchSection(method=method, **base)
        r = timed_search(prepared, scfg, compute)
        out[method] = r
        scan = sum(d["rings"] + d["pairs_or_screen"] + d["scan"] for d in r["per_radius"].values())
        print(f"{method}: wall {r['wall']:.1f} s (chunks {r['t_chunks']:.1f} s, refinement {r['t_final']:.1f} s), "
              f"{r['pool'].pairs_scanned:,} exact pair scans", flush=True)
        if method == "fast":
            tot = {k: sum(d[k] for d in r["per_radius"].values()) for k in ("rings", "pairs_or_screen", "scan")}
            print(f"  fast: rings {tot['rings']:.1f} s, screen {tot['pairs_or_screen']:.1f} s, exact {tot['scan']:.1f} s",
                  flush=True)
        for q, row in enumerate(r["cand"][:5]):
            print(f"  {method} #{q + 1}: radius {row['radius_deg']:.2f}, ({row['lon1_deg']:.1f}, {row['lat1_deg']:.1f}) & "
                  f"({row['lon2_deg']:.1f}, {row['lat2_deg']:.1f}), twist {row['twist_deg']:.1f}, flip {bool(row['flip'])}, "
                  f"s {row['s']:.4f}")
        del scan
    # survival of the injected pairs on this sky
    plan_f = out["fast"]["plan"]
    kr = search.known_pair_ranks(plan_f, circ, s_min=args.s_min)
    print("injected pairs detected (best grid S > %.2f): %d; screen ranks %s (survive when < %d)" % (
        args.s_min, len(kr), [k["rank"] for k in kr], args.partners))
    if args.skip_exhaustive:
        return
    same, n_top = same_candidates(out["exhaustive"]["cand"], out["fast"]["cand"], args.s_min)
    print(f"same top candidates (all {n_top} exhaustive candidates with s > {args.s_min}): {'yes' if same else 'NO'}")
    t_exh, t_fast = out["exhaustive"]["wall"], out["fast"]["wall"]
    scan_exh = out["exhaustive"]["t_chunks"]
    scan_fast = out["fast"]["t_chunks"]
    print(f"scan-only speedup (chunks, without the shared refinement): {scan_exh / scan_fast:.1f}")
    pair_cost = pair_cost_model(out["exhaustive"]["per_radius"])
    print(f"exhaustive cost per pair scan (both senses, all twists): "
          + ", ".join(f"N={d['nsamp']}: {1e6 * d['scan'] / max(d['pairs'], 1):.2f} us"
                      for d in list(out['exhaustive']['per_radius'].values())[::5]))
    if not args.no_projection:
        print("projection to nside_centers 64, radii 10-90 deg step 1, separations 10-180 deg:", flush=True)
        pe, pf, pairs64, rows, t_once = project_full(prepared, compute, pair_cost, args.partners)
        print(f"  exhaustive: {pairs64:.3g} pairs per radius x 81 radii x (seconds per pair at each radius' ring "
              f"length, fitted as a + b N log2 N on the nside_centers 32 run) = {pe / 3600:.1f} h")
        print(f"  fast: rings + screen + exact scans measured at nside_centers 64 on radii "
              f"{[x[0] for x in rows]}, interpolated linearly over the 81 radii, plus {t_once:.1f} s once for the "
              f"separation lists = {pf / 60:.1f} min (refinement of the top candidates not included)")
    print(f"load average at end: {os.getloadavg()}")
    print(f"speedup: {t_exh / t_fast:.1f}")


def run_campaign(args):
    skies = campaign_skies(args.campaign, args.seed)
    compute = ComputeSection(threads=args.threads, memory_gb=args.memory_gb)
    report = {}
    for nsc in args.campaign_nside:
        radii = tuple(args.radii) if nsc != 64 or not args.full_radii_at_64 else (10.0, 90.0, 1.0)
        ranks, by_radius, rows = [], [], []
        for q, (kind, lengths, obs, rot, seed) in enumerate(skies):
            prepared, circ = make_sky(kind, lengths, obs, rot, seed)
            scfg = SearchSection(family="general", method="fast", nside_centers=nsc, radius_deg=radii,
                                 separation_deg=tuple(args.sep), screen_partners=args.partners)
            plan = search.make_plan(prepared, scfg, compute)
            kr = search.known_pair_ranks(plan, circ, s_min=args.s_min)
            for k in kr:
                ranks.append(k["rank"])
                by_radius.extend(k["ranks_by_radius"].values())
                rows.append((kind, round(k["radius_deg"], 2), round(k["s"], 3), k["rank"]))
            print(f"nside_centers {nsc} sky {q} ({kind}): {len(kr)} detected pairs, ranks {[k['rank'] for k in kr]}",
                  flush=True)
        ranks = np.array(ranks)
        by_radius = np.array(by_radius)
        line = dict(nside_centers=nsc, radii=list(radii), pairs=int(ranks.size), max_rank=int(ranks.max()),
                    survival={K: float(np.mean(ranks < K)) for K in (1, 2, 4, 8, 16, 32, 64)},
                    radius_events=int(by_radius.size),
                    survival_every_radius={K: float(np.mean(by_radius < K)) for K in (1, 4, 16, 64)},
                    ranks=sorted(int(x) for x in ranks))
        report[nsc] = line
        print(json.dumps({k: v for k, v in line.items() if k != "ranks"}), flush=True)
        print("ranks:", line["ranks"], flush=True)
    print(json.dumps({str(k): v["ranks"] for k, v in report.items()}))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--nside-centers", type=int, default=32)
    ap.add_argument("--radii", type=float, nargs=3, default=(20.0, 60.0, 2.0))
    ap.add_argument("--sep", type=float, nargs=2, default=(10.0, 180.0))
    ap.add_argument("--partners", type=int, default=64)
    ap.add_argument("--top", type=int, default=20)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--memory-gb", type=float, default=4.0)
    ap.add_argument("--s-min", type=float, default=0.6)
    ap.add_argument("--skip-exhaustive", action="store_true")
    ap.add_argument("--no-projection", action="store_true")
    ap.add_argument("--campaign", type=int, default=0, help="torus and half-turn skies each (survival mode)")
    ap.add_argument("--campaign-nside", type=int, nargs="+", default=(16, 32))
    ap.add_argument("--full-radii-at-64", action="store_true", help="campaign at nside_centers 64 on radii 10-90 step 1")
    ap.add_argument("--seed", type=int, default=2024)
    args = ap.parse_args(argv)
    if args.campaign:
        run_campaign(args)
    else:
        run_benchmark(args)


if __name__ == "__main__":
    main()
