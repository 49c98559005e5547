#!/usr/bin/env python
"""Survival of detected injected pairs through the single-level and the coarse-to-fine screen.

On the reference campaign of ``scripts/benchmark_screen.py`` (``--skies`` tori and as many half-turn
spaces E2 of random size, orientation and observer; noiseless Sachs-Wolfe skies, Nside 64, lmax 128,
3 deg beam), searched at ``--nside-centers`` (default 64) on radii 10-90 deg step 1, separations
10-180 deg: every injected pair the exhaustive search detects (best grid pair S > 0.6, evaluated
exactly near the truth, :func:`twinring.search.known_pair_ranks`; only the radii next to each pair are
computed) is ranked by the single-level screen and by the coarse-to-fine screen with ``--levels``
coarse levels keeping K partners at both levels, for each K in ``--partners``.  Prints per sky the
ranks, then the survival at each K with the number of pairs.

    OMP_NUM_THREADS=1 nohup nice python scripts/benchmark_hierarchy.py > /tmp/bench_hierarchy.log 2>&1 &
"""
from __future__ import annotations

import argparse
import os
import sys
import time
import warnings

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
sys.path.insert(0, os.path.join(os.path.dirname(HERE), "tests"))

import benchmark_screen as bs  # noqa: E402
from twinring import screen, search  # noqa: E402
from twinring.config import SearchSection  # noqa: E402

warnings.filterwarnings("ignore", category=RuntimeWarning)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--skies", type=int, default=6, help="tori, and as many half-turn spaces")
    ap.add_argument("--seed", type=int, default=2024)
    ap.add_argument("--nside-centers", type=int, default=64)
    ap.add_argument("--levels", type=int, default=1)
    ap.add_argument("--partners", type=int, nargs="+", default=(8, 16, 32, 64))
    args = ap.parse_args(argv)
    print("start: load average %.2f %.2f %.2f" % os.getloadavg(), flush=True)
    single, hier = [], {k: [] for k in args.partners}
    for q, (kind, lengths, obs, rot, sd) in enumerate(bs.campaign_skies(args.skies, args.seed)):
        t = time.perf_counter()
        p, circ = bs.make_sky(kind, lengths, obs, rot, sd)
        scfg = SearchSection(family="general", method="fast", nside_centers=args.nside_centers,
                             radius_deg=(10.0, 90.0, 1.0), separation_deg=(10.0, 180.0),
                             screen_partners=max(args.partners), screen_levels=args.levels)
        plan = search.make_plan(p, scfg)
        kr = search.known_pair_ranks(plan, circ, s_min=0.6, hier_partners=tuple(args.partners))
        single += [k["rank"] for k in kr]
        for k in args.partners:
            hier[k] += [x["hier_rank"][k] for x in kr]
        print(f"sky {q} {kind}: {len(kr)} detected pairs; single-level ranks {[x['rank'] for x in kr]}; "
              f"coarse-to-fine ranks (K: ranks) "
              f"{ {k: [x['hier_rank'][k] for x in kr] for k in args.partners} }; {time.perf_counter() - t:.0f} s; "
              "load %.2f" % os.getloadavg()[0], flush=True)
        search.clear_ring_caches()
    n = len(single)
    print(f"{n} detected pairs on {2 * args.skies} skies, nside_centers {args.nside_centers}, radii 10-90 deg step 1")
    for k in args.partners:
        s1 = sum(r < k for r in single)
        s2 = sum(r is not None and r < k for r in hier[k])
        print(f"K = {k}: single-level {s1} of {n} ({s1 / max(n, 1):.3f}); coarse-to-fine ({args.levels} level) "
              f"{s2} of {n} ({s2 / max(n, 1):.3f})")
    from collections import Counter
    print("single-level rank histogram", dict(sorted(Counter(single).items())))
    for k in args.partners:
        print(f"coarse-to-fine K = {k} rank histogram",
              dict(sorted(Counter(-1 if r is None else r for r in hier[k]).items())), "(-1: dropped at the coarse level)")
    print("end: load average %.2f %.2f %.2f" % os.getloadavg())


if __name__ == "__main__":
    main()
