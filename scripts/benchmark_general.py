#!/usr/bin/env python
"""Benchmark of a calibrated general search on one workstation: stage times and projections.

In one run:

1. a fast general search (``search.method: fast``) on a sky with matched circles (a half-turn space E2
   seen off its axis, Nside 64, lmax 128, 3 deg beam) at nside_centers 32, radii 10-90 deg step 2,
   separations 10-180 deg, timed stage by stage: ring synthesis and spectra, the screen, the exact
   scans of the survivors, combining, refinement of the top candidates;
2. the projection to the full search at nside_centers 64, radii 10-90 deg step 1: rings, screen and
   exact scans measured at nside_centers 64 on a few radii (``--sample-radii``) and interpolated
   linearly in radius over the 81 radii, plus the separation lists (once per process) and the
   refinement measured in step 1; once with the single-level screen at K = 64 (the screen before the
   coarse-to-fine one, for comparison) and once with the default screen for nside_centers 64
   (``search.screen_levels`` and ``search.screen_partners`` null; ``--levels``, ``--partners`` override);
3. the projection to a calibration of 100 simulations: one simulation (Gaussian sky at the default
   ``calibrate.sim_nside``, prepare) timed, plus the default screen's grid scan of step 2 without
   refinement (calibration needs grid peaks only), times 100;
4. survival: the fraction of injected circle pairs detected by the exhaustive search (best grid pair
   S > 0.6) that pass the default screen at nside_centers 64, radii 10-90 deg step 1, over this sky and
   ``--skies`` tori and half-turn spaces of random size, orientation and observer
   (:func:`twinring.search.known_pair_ranks`: rank, or with coarse levels hier_rank, < K).  The larger
   campaign is ``scripts/benchmark_hierarchy.py``.

The machine's load average is printed at the start and the end (the machine may be shared).  Last
line: ``general64 minutes=<m> calib100 hours=<h> survival=<fraction>``.

    nohup nice python scripts/benchmark_general.py > /tmp/bench_general.log 2>&1 &
"""
from __future__ import annotations

import argparse
import math
import os
import sys
import time
import warnings

# BLAS single-threaded, as the command line sets it (pipeline/cli.py): the search's own threads use the cores
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
sys.path.insert(0, os.path.join(os.path.dirname(HERE), "tests"))

import benchmark_screen as bs  # noqa: E402
from twinring import calibrate, prepare, rings, screen, search  # noqa: E402
from twinring.config import ComputeSection, SearchSection, config_from_dict  # noqa: E402

warnings.filterwarnings("ignore", category=RuntimeWarning)


def load():
    return "load average %.2f %.2f %.2f" % os.getloadavg()


def timed_fast_search(prepared, scfg, compute):
    """The fast general search with every stage timed (the same work as twinring.search.run_search)."""
    t_all = time.perf_counter()
    plan = search.make_plan(prepared, scfg, compute)
    st = dict(rings=0.0, screen=0.0, exact=0.0, combine=0.0, refine=0.0, separation_lists=0.0)
    t = time.perf_counter()
    screen.excluded_partners(plan.centres, plan.sep_cos)
    st["separation_lists"] = time.perf_counter() - t
    results = []
    pairs = 0
    for chunk in plan.chunk_ids():
        ir = chunk[0]
        t = time.perf_counter()
        search.ring_set(plan, ir)
        st["rings"] += time.perf_counter() - t
        t = time.perf_counter()
        i, _ = search._block_pairs(plan, chunk[1], ir)     # the screen (kept for scan_chunk by bs's cache)
        st["screen"] += time.perf_counter() - t
        pairs += int(i.size)
        t = time.perf_counter()
        results.append(search.scan_chunk(plan, chunk))
        st["exact"] += time.perf_counter() - t
    t = time.perf_counter()
    pool = search.combine(plan, results)
    st["combine"] = time.perf_counter() - t
    t = time.perf_counter()
    cand, _ = search.finalize(plan, pool, scfg.top, refine=True)
    st["refine"] = time.perf_counter() - t
    st["wall"] = time.perf_counter() - t_all
    return plan, pool, cand, st, pairs


def project_general64(prepared, compute, partners, levels, sample_radii):
    """Per-radius seconds (rings, screen, exact) at nside_centers 64 on ``sample_radii`` with the screen of
    ``levels`` coarse levels keeping ``partners`` (None: the defaults for the grid), interpolated over radii
    10-90 deg step 1; returns (scan seconds, separation-list seconds, rows)."""
    scfg = SearchSection(family="general", method="fast", nside_centers=64, radius_deg=(10.0, 90.0, 1.0),
                         separation_deg=(10.0, 180.0), screen_partners=partners, screen_levels=levels)
    plan = search.make_plan(prepared, scfg, compute)
    t = time.perf_counter()
    screen._EXCL_CACHE.clear()
    if plan.screen_levels:           # the coarse grid's lists, with the widened range
        coarse, _, _, radius = screen.coarse_grid(64, plan.screen_levels)
        screen.excluded_partners(coarse, screen.widened_sep_cos(plan.sep_cos, 2 * radius))
    else:
        screen.excluded_partners(plan.centres, plan.sep_cos)
    t_once = time.perf_counter() - t
    rows = []
    for r in sample_radii:
        ir = int(round(r - 10.0))
        t = time.perf_counter()
        search.ring_set(plan, ir)
        if plan.screen_levels:
            search.coarse_ring_set(plan, ir)
        t_r = time.perf_counter() - t
        t = time.perf_counter()
        i, _ = search._block_pairs(plan, 0, ir)
        t_s = time.perf_counter() - t
        t = time.perf_counter()
        search.scan_chunk(plan, (ir, 0))
        t_e = time.perf_counter() - t
        rows.append((r, t_r, t_s, t_e, int(i.size)))
        print(f"  nside_centers 64, {plan.screen_levels} coarse level(s), K = {plan.screen_partners}, radius "
              f"{r:4.0f} deg: rings {t_r:5.1f} s, screen {t_s:5.1f} s, exact {t_e:5.1f} s on {i.size:,} pairs; "
              f"{load()}", flush=True)
    radii = np.arange(10.0, 90.5, 1.0)
    xs = np.array([x[0] for x in rows])
    per = {k: np.interp(radii, xs, [x[q] for x in rows]) for q, k in ((1, "rings"), (2, "screen"), (3, "exact"))}
    search.clear_ring_caches()
    return {k: float(v.sum()) for k, v in per.items()}, t_once, rows, plan


def time_one_simulation(prepared, threads):
    """Seconds to make and prepare one calibration sky at the default calibrate.sim_nside (Nside 64 input)."""
    cfg = config_from_dict({"prepare": {"nside": 64, "lmax": 128, "fwhm_deg": 3.0},
                            "compute": {"threads": threads, "progress": False}})
    sky_nside = 2048                     # a typical input map: the default sim_nside no longer follows it
    nside = calibrate.sim_nside_for(cfg, sky_nside)
    cl = np.asarray(prepared_cl(prepared), float)
    ctx = calibrate.SimContext(cl=cl, nside=nside, mask=None, noise_sigma=0.0, prep=cfg.prepare, search=None,
                               key="bench", compute=cfg.compute)
    t = time.perf_counter()
    sky = calibrate.simulate_sky(ctx, 0)
    prepare.prepare_map(sky, cfg.prepare, nthreads=threads)
    return time.perf_counter() - t, nside


def prepared_cl(prepared):
    import healpy as hp

    return hp.alm2cl(prepared.alm, lmax=prepared.lmax)


def survival(prepared, circ, n_skies, seed):
    """Ranks of the detected injected pairs in the default screen at nside_centers 64 (radii 10-90 deg step 1)
    on this sky and ``n_skies`` campaign skies: (ranks, K, levels); a rank of None (dropped at the coarse
    level) or >= K does not survive."""
    ranks = []
    skies = [("this", prepared, circ)]
    for kind, lengths, obs, rot, sd in bs.campaign_skies(n_skies // 2 + n_skies % 2, seed)[: n_skies]:
        p, c = bs.make_sky(kind, lengths, obs, rot, sd)
        skies.append((kind, p, c))
    for kind, p, c in skies:
        scfg = SearchSection(family="general", method="fast", nside_centers=64, radius_deg=(10.0, 90.0, 1.0),
                             separation_deg=(10.0, 180.0))
        plan = search.make_plan(p, scfg)
        kr = search.known_pair_ranks(plan, c, s_min=0.6)
        ranks += [k["hier_rank"][plan.screen_partners] if plan.screen_levels else k["rank"] for k in kr]
        search.clear_ring_caches()
    return ranks, plan.screen_partners, plan.screen_levels


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--partners", type=int, default=None, help="K of the projected screen (default: the grid's)")
    ap.add_argument("--levels", type=int, default=None, help="coarse levels of the projected screen (default: the grid's)")
    ap.add_argument("--top", type=int, default=20)
    ap.add_argument("--sample-radii", type=float, nargs="+", default=(10.0, 50.0, 90.0))
    ap.add_argument("--skies", type=int, default=2, help="campaign skies for the survival (besides this one)")
    ap.add_argument("--seed", type=int, default=2024)
    args = ap.parse_args(argv)
    search._block_pairs = bs._cached_block_pairs
    compute = ComputeSection(threads=args.threads, memory_gb=4.0)
    print(f"start: {load()}; {os.cpu_count()} cores; threads {args.threads}; OMP_NUM_THREADS "
          f"{os.environ.get('OMP_NUM_THREADS')}", flush=True)
    lengths, observer = (2.5, 2.5, 1.6), (0.3, 0.2, 0.1)
    prepared, circ = bs.make_sky("half", lengths, observer, bs._rotation(np.random.default_rng(7)), seed=12)

    scfg = SearchSection(family="general", method="fast", nside_centers=32, radius_deg=(10.0, 90.0, 2.0),
                         separation_deg=(10.0, 180.0), top=args.top)
    plan, pool, cand, st, pairs = timed_fast_search(prepared, scfg, compute)
    print(f"general32 (fast, nside_centers 32, radii 10-90 deg step 2, {len(plan.radii_deg)} radii): "
          f"wall {st['wall']:.1f} s = rings {st['rings']:.1f} + screen {st['screen']:.1f} + exact {st['exact']:.1f} "
          f"({pairs:,} pairs) + combine {st['combine']:.2f} + refine {st['refine']:.1f} (top {args.top}) + "
          f"separation lists {st['separation_lists']:.1f}; {load()}", flush=True)
    for q, row in enumerate(cand[:3]):
        print(f"  #{q + 1}: radius {row['radius_deg']:.2f}, separation {row['separation_deg']:.1f}, "
              f"flip {bool(row['flip'])}, s {row['s']:.3f}")
    search.clear_ring_caches()

    print("projection to nside_centers 64, radii 10-90 deg step 1 (81 radii):", flush=True)
    figures = {}
    for name, partners, levels in (("single-level screen, K = 64 (before issue 16's coarse-to-fine screen)", 64, 0),
                                   ("default screen", args.partners, args.levels)):
        per, t_once, rows, plan64 = project_general64(prepared, compute, partners, levels, tuple(args.sample_radii))
        scan64 = per["rings"] + per["screen"] + per["exact"] + t_once
        general64 = scan64 + st["refine"]
        figures[name] = (scan64, general64)
        print(f"  {name} ({plan64.screen_levels} coarse level(s), K = {plan64.screen_partners}): rings "
              f"{per['rings'] / 60:.1f} min + screen {per['screen'] / 60:.1f} min + exact {per['exact'] / 60:.1f} min "
              f"+ separation lists {t_once:.1f} s + refinement {st['refine']:.1f} s (as measured at 32) = "
              f"{general64 / 60:.1f} min", flush=True)
    scan64, general64 = figures["default screen"]

    t_sim, sim_nside = time_one_simulation(prepared, args.threads)
    per_sim = t_sim + scan64
    print(f"calibration: one simulation = sky + prepare {t_sim:.2f} s (sim_nside {sim_nside} by default for "
          f"prepare.nside 64, lmax 128) + grid scan {scan64 / 60:.1f} min (no refinement) = {per_sim / 60:.1f} min; "
          f"100 simulations = {100 * per_sim / 3600:.1f} h (single-level screen: "
          f"{100 * (t_sim + figures[next(iter(figures))][0]) / 3600:.1f} h)", flush=True)

    ranks, K, levels = survival(prepared, circ, args.skies, args.seed)
    ok = [r is not None and r < K for r in ranks]
    frac = float(np.mean(ok)) if ok else float("nan")
    print(f"survival: {sum(ok)} of {len(ranks)} detected injected pairs pass the default screen at nside_centers 64 "
          f"({levels} coarse level(s), K = {K}; ranks {sorted(ranks, key=lambda r: (r is None, r or 0))}; screen "
          f"dimension {screen.SCREEN_DIM})")
    print(f"end: {load()}")
    print(f"general64 minutes={general64 / 60:.1f} calib100 hours={100 * per_sim / 3600:.1f} survival={frac:.3f}")


if __name__ == "__main__":
    main()
