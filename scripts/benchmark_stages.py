#!/usr/bin/env python
"""Stage timings that compare two versions of twinring on the same machine (run it once per version,
e.g. with an older checkout first on PYTHONPATH, alternating so both see the same load).

Prints, each with the load average beside it:

* ``antipodal32``: the antipodal search of the issue's target (cubic torus sky, Nside 64, lmax 128,
  nside_centers 32, radii 20-80 deg step 1, top 20 refined), whole run_search;
* ``fast16``: a fast general search (nside_centers 16, radii 20-60 deg step 2, top 20 refined), whole
  run_search, and its refinement alone;
* ``screen64``: the screen of one radius (50 deg) at nside_centers 64 (features and top partners);
* ``sim``: one calibration sky made and prepared at Nside 2048 and at the default sim_nside.
"""
from __future__ import annotations

import argparse
import os
import sys
import time
import warnings

# BLAS single-threaded, as the command line sets it (pipeline/cli.py): the search's own threads use the cores
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(os.path.dirname(HERE), "tests"))

from twinring import search  # noqa: E402
from twinring.config import ComputeSection, SearchSection  # noqa: E402

warnings.filterwarnings("ignore", category=RuntimeWarning)


def load():
    return "%.2f" % os.getloadavg()[0]


def clear():
    search.clear_ring_caches()
    from twinring import rings
    if hasattr(rings, "clear_geometry_cache"):
        rings.clear_geometry_cache()


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--only", nargs="*", default=("antipodal32", "fast16", "screen64", "sim"))
    args = ap.parse_args(argv)
    from conftest import periodic_field_on_sphere, prepared_from_map

    compute = ComputeSection(threads=args.threads)
    print(f"twinring from {os.path.dirname(search.__file__)}", flush=True)
    if "antipodal32" in args.only:
        m = periodic_field_on_sphere((1.2,) * 3, 64, kmax=140, seed=11)
        p = prepared_from_map(m, 128, 3.0)
        sc = SearchSection(family="antipodal", nside_centers=32, radius_deg=(20.0, 80.0, 1.0), top=20)
        clear()
        t = time.perf_counter()
        search.run_search(p, sc, compute)
        print(f"antipodal32 seconds={time.perf_counter() - t:.2f} load={load()}", flush=True)
    if "fast16" in args.only:
        sys.path.insert(0, HERE)
        import benchmark_screen as bs

        p, _ = bs.make_sky("half", (2.5, 2.5, 1.6), (0.3, 0.2, 0.1), bs._rotation(np.random.default_rng(7)), seed=12)
        sc = SearchSection(family="general", method="fast", nside_centers=16, radius_deg=(20.0, 60.0, 2.0), top=20)
        clear()
        t = time.perf_counter()
        plan = search.make_plan(p, sc, compute)
        res = [search.scan_chunk(plan, c) for c in plan.chunk_ids()]
        pool = search.combine(plan, res)
        t1 = time.perf_counter()
        search.finalize(plan, pool, sc.top, refine=True)
        t2 = time.perf_counter()
        print(f"fast16 seconds={t2 - t:.2f} refine={t2 - t1:.2f} load={load()}", flush=True)
    if "screen64" in args.only:
        from twinring import screen

        sys.path.insert(0, HERE)
        import benchmark_screen as bs

        p, _ = bs.make_sky("half", (2.5, 2.5, 1.6), (0.3, 0.2, 0.1), bs._rotation(np.random.default_rng(7)), seed=12)
        sc = SearchSection(family="general", method="fast", nside_centers=64, radius_deg=(50.0, 50.0, 1.0))
        plan = search.make_plan(p, sc, compute)
        spec = search.ring_set(plan, 0)
        screen.excluded_partners(plan.centres, plan.sep_cos)
        t = time.perf_counter()
        import inspect

        kw = {"threads": plan.threads} if "threads" in inspect.signature(screen.screen_pairs).parameters else {}
        screen.screen_pairs(spec, plan.centres, plan.sep_cos, plan.screen_partners, plan.min_valid_fraction,
                            plan.screen_mmax, plan.memory_gb, **kw)
        print(f"screen64 seconds={time.perf_counter() - t:.2f} load={load()}", flush=True)
        clear()
    if "sim" in args.only:
        import healpy as hp
        from twinring import calibrate, prepare
        from twinring.config import config_from_dict

        cfg = config_from_dict({"prepare": {"nside": 64, "lmax": 128, "fwhm_deg": 3.0}})
        cl = np.zeros(129)
        cl[2:] = 1e3 / np.arange(2, 129) ** 2
        for nside in sorted({2048, calibrate.sim_nside_for(cfg, 2048)}):
            ctx = calibrate.SimContext(cl=cl, nside=nside, mask=None, noise_sigma=0.0, prep=cfg.prepare, search=None)
            t = time.perf_counter()
            prepare.prepare_map(calibrate.simulate_sky(ctx, 0), cfg.prepare)
            print(f"sim nside={nside} seconds={time.perf_counter() - t:.2f} load={load()}", flush=True)
        del hp


if __name__ == "__main__":
    main()
