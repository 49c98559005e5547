#!/usr/bin/env python
"""Benchmark: the screen's own top-K selection against maximum-inner-product search indexes (faiss).

The screen keeps, per centre, the K partners of largest feature inner product outside the excluded
separations (twinring.screen.top_partners).  A maximum-inner-product search library answers "the k
largest inner products" per query; the separation exclusion is applied afterwards, so the query asks
for k = K + margin partners (``--query``; the excluded disc about a centre holds ~370 centres at
nside_centers 64 for separations from 10 deg, and those rings, overlapping the centre's own, score
high).  For each method, on one radius of the half-turn sky of scripts/benchmark_general.py:

* wall time (index build + query + exclusion + top-K selection);
* recall: the fraction of the exact screen's surviving pairs that the method also returns;
* survival: of the injected pairs the exhaustive search detects (best grid S > 0.6) on that sky and
  ``--skies`` campaign skies at nside_centers 32, radii 20-60 deg step 2, the fraction the method keeps.

faiss-cpu is not a dependency of twinring: install it in a scratch venv (``pip install faiss-cpu``).
The load average is printed at the start and the end.  Last line: ``mips best=<method> speedup=<x>``
(the fastest method with survival >= 0.99 and its speed relative to the screen's own selection).
"""
from __future__ import annotations

import argparse
import os
import sys
import time
import warnings

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
sys.path.insert(0, os.path.join(os.path.dirname(HERE), "tests"))

import benchmark_screen as bs  # noqa: E402
from benchmark_general import load  # noqa: E402
from twinring import screen, search  # noqa: E402
from twinring.config import ComputeSection, SearchSection  # noqa: E402

warnings.filterwarnings("ignore", category=RuntimeWarning)


def _filtered(D, L, F, centres, sep_cos, partners, use):
    """Pairs (i, j), i < j, from per-query index answers: drop the centre itself, unusable rings and
    excluded separations, keep the K best per centre (twinring.screen._select), either end keeps."""
    n = F.shape[0]
    rows = np.repeat(np.arange(n), L.shape[1])
    cols = L.ravel().astype(np.int64)
    vals = D.ravel().astype(np.float32)
    ok = cols >= 0
    rows, cols, vals = rows[ok], cols[ok], vals[ok]
    d = np.einsum("ij,ij->i", centres[rows], centres[cols])
    ok = use[rows] & use[cols] & (rows != cols) & screen._allowed_dots(d, sep_cos)
    r, c, counts = screen._select(rows[ok], cols[ok], vals[ok], n, partners)
    key = np.unique(np.minimum(r, c) * n + np.maximum(r, c))
    return key // n, key % n, int(np.sum(use & (counts < partners)))


def methods(args):
    import faiss

    faiss.omp_set_num_threads(args.threads)

    def own(F, centres, sep_cos, K, use):
        i, j = screen.top_partners(F, centres, sep_cos, K, use, threads=args.threads)
        return i, j, 0

    def flat(F, centres, sep_cos, K, use):
        idx = faiss.IndexFlatIP(F.shape[1])
        idx.add(F)
        D, L = idx.search(F, args.query)
        return _filtered(D, L, F, centres, sep_cos, K, use)

    def ivf(nlist, nprobe):
        def run(F, centres, sep_cos, K, use):
            q = faiss.IndexFlatIP(F.shape[1])
            idx = faiss.IndexIVFFlat(q, F.shape[1], nlist, faiss.METRIC_INNER_PRODUCT)
            idx.cp.min_points_per_centroid = 1
            idx.train(F[use])
            idx.add(F)
            idx.nprobe = nprobe
            D, L = idx.search(F, args.query)
            return _filtered(D, L, F, centres, sep_cos, K, use)
        return run

    def hnsw(ef):
        def run(F, centres, sep_cos, K, use):
            idx = faiss.IndexHNSWFlat(F.shape[1], 16, faiss.METRIC_INNER_PRODUCT)
            idx.hnsw.efConstruction = 80
            idx.add(F)
            idx.hnsw.efSearch = max(ef, args.query)
            D, L = idx.search(F, args.query)
            return _filtered(D, L, F, centres, sep_cos, K, use)
        return run

    return {"screen (exact, own)": own, "faiss flat (exact)": flat, "faiss ivf 1024/32": ivf(1024, 32),
            "faiss ivf 1024/128": ivf(1024, 128), "faiss hnsw ef 128": hnsw(128)}


def vectors(plan, ir):
    spec = search.ring_set(plan, ir)
    use = screen.usable_rings(spec, plan.min_valid_fraction)
    return screen.screen_vectors(spec, use, plan.screen_mmax), use


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--partners", type=int, default=64)
    ap.add_argument("--query", type=int, default=512, help="partners asked of the index per centre (K + margin)")
    ap.add_argument("--nside-centers", type=int, default=64)
    ap.add_argument("--radius", type=float, default=50.0)
    ap.add_argument("--skies", type=int, default=2, help="campaign skies for the survival (besides this one)")
    ap.add_argument("--seed", type=int, default=2024)
    args = ap.parse_args(argv)
    try:
        run = methods(args)
    except ImportError:
        print("faiss is not installed (pip install faiss-cpu in a scratch venv); nothing measured")
        return 0
    print(f"start: {load()}; threads {args.threads}; K = {args.partners}, query k = {args.query}", flush=True)
    prepared, circ = bs.make_sky("half", (2.5, 2.5, 1.6), (0.3, 0.2, 0.1), bs._rotation(np.random.default_rng(7)),
                                 seed=12)
    scfg = SearchSection(family="general", method="fast", nside_centers=args.nside_centers,
                         radius_deg=(args.radius, args.radius, 1.0), separation_deg=(10.0, 180.0),
                         screen_partners=args.partners)
    plan = search.make_plan(prepared, scfg, ComputeSection(threads=args.threads))
    F, use = vectors(plan, 0)
    screen.excluded_partners(plan.centres, plan.sep_cos)
    timing, ref = {}, None
    for name, fn in run.items():
        t = time.perf_counter()
        i, j, short = fn(F, plan.centres, plan.sep_cos, args.partners, use)
        timing[name] = time.perf_counter() - t
        got = set(zip(i.tolist(), j.tolist()))
        ref = got if ref is None else ref
        print(f"  nside_centers {args.nside_centers}, radius {args.radius:.0f} deg: {name}: {timing[name]:.2f} s, "
              f"{len(got):,} pairs, recall of the exact screen's pairs {len(got & ref) / len(ref):.4f}, "
              f"centres short of K {short}; {load()}", flush=True)
    search.clear_ring_caches()

    # survival of detected injected pairs at nside_centers 32, radii 20-60 deg step 2
    kept = {name: 0 for name in run}
    total = 0
    skies = [(prepared, circ)] + [bs.make_sky(k, L, o, r, s)
                                  for k, L, o, r, s in bs.campaign_skies(args.skies, args.seed)[: args.skies]]
    for p, c in skies:
        scfg = SearchSection(family="general", method="fast", nside_centers=32, radius_deg=(20.0, 60.0, 2.0),
                             separation_deg=(10.0, 180.0), screen_partners=args.partners)
        plan = search.make_plan(p, scfg)
        found = search.known_pair_ranks(plan, c, s_min=0.6)
        total += len(found)
        for ir in sorted({k["ir"] for k in found}):
            F, use = vectors(plan, ir)
            for name, fn in run.items():
                i, j, _ = fn(F, plan.centres, plan.sep_cos, args.partners, use)
                got = set(zip(i.tolist(), j.tolist()))
                kept[name] += sum((min(k["i"], k["j"]), max(k["i"], k["j"])) in got for k in found if k["ir"] == ir)
        search.clear_ring_caches()
    best, base = None, timing["screen (exact, own)"]
    for name in run:
        frac = kept[name] / total if total else float("nan")
        print(f"survival, {name}: {kept[name]} of {total} detected injected pairs")
        if frac >= 0.99 and (best is None or timing[name] < timing[best]):
            best = name
    print(f"end: {load()}")
    print(f"mips best={best.replace(' ', '_')} speedup={base / timing[best]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
