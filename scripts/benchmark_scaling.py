"""Wall time of one search with 1 and 2 workers (``processes`` backend) on this machine.

The sky is made here: a Gaussian field with P(k) ~ k^-3 (Sachs-Wolfe-like,
n_s = 1), periodic on a cubic 3-torus of side ``--side`` (in units of the
last-scattering distance), evaluated on the unit sphere with finufft.  The
search (general family, all pairs of centres in the separation range) is run
in this process through ``twinring.search.run_search`` with the chunk runner
``twinring.execute.run_units``, once per worker count; the time covers plan,
every chunk, combine and finalize.  With one worker the chunks run in this
process (no pool); with two, a joblib (loky) pool is started inside the timed
call.  The tables of every run are checked to be identical.

Prints one line per worker count and, as its last line, ``speedup: X``
(time with 1 worker / time with the largest worker count).  The load average
before and after is printed too: on a machine shared with other jobs the
wall times (and so the speedup) reflect that load, not the code.
"""
from __future__ import annotations

import argparse
import os
import time

import healpy as hp
import numpy as np


def torus_sky(side, nside, kmax, seed):
    """A k^-3 Gaussian field with period ``side`` along x, y, z, on the unit sphere (about 30 uK rms)."""
    import finufft

    rng = np.random.default_rng(seed)
    n = int(np.floor(kmax * side / (2 * np.pi)))
    g = np.arange(-n, n + 1)
    kx, ky, kz = np.meshgrid(*(2 * np.pi * g / side,) * 3, indexing="ij")
    k = np.sqrt(kx ** 2 + ky ** 2 + kz ** 2)
    amp = np.zeros_like(k)
    ok = (k > 0) & (k <= kmax)
    amp[ok] = k[ok] ** -1.5
    c = (rng.normal(size=k.shape) + 1j * rng.normal(size=k.shape)) * amp
    c = 0.5 * (c + np.conj(c[::-1, ::-1, ::-1]))
    v = np.stack(hp.pix2vec(nside, np.arange(hp.nside2npix(nside))), -1)
    pts = [np.ascontiguousarray(2 * np.pi * v[:, d] / side) for d in range(3)]
    m = finufft.nufft3d2(*pts, np.ascontiguousarray(c), isign=1, eps=1e-9).real
    return (m - m.mean()) / m.std() * 30.0


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--nside", type=int, default=32, help="Nside of the synthetic map and the prepared map")
    ap.add_argument("--lmax", type=int, default=64)
    ap.add_argument("--nside-centers", type=int, default=16)
    ap.add_argument("--radii", type=float, nargs=3, default=(30.0, 70.0, 10.0), metavar=("MIN", "MAX", "STEP"))
    ap.add_argument("--side", type=float, default=1.2, help="torus side / distance to last scattering")
    ap.add_argument("--workers", type=int, nargs="+", default=(1, 2), help="worker counts to time")
    ap.add_argument("--refine", action="store_true", help="include the (serial) refinement of candidates")
    args = ap.parse_args()

    from twinring import search
    from twinring.config import config_from_dict
    from twinring.prepare import prepare_map
    from twinring.skymap import SkyMap

    m = torus_sky(args.side, args.nside, kmax=2.0 * args.lmax, seed=2024)
    sky = SkyMap(values=m, mask=np.ones_like(m), nside=args.nside, unit_in="uK", frame=None, checksum="synthetic")
    base = {
        "prepare": {"nside": args.nside, "lmax": args.lmax, "fwhm_deg": 5.0},
        "search": {"family": "general", "nside_centers": args.nside_centers, "radius_deg": list(args.radii),
                   "top": 10, "refine": bool(args.refine)},
    }
    cfg0 = config_from_dict(base, source="benchmark")
    prepared = prepare_map(sky, cfg0.prepare)
    print(f"sky: torus side {args.side}, map Nside {args.nside}, lmax {args.lmax}; search: general, "
          f"nside_centers {args.nside_centers}, radii {list(args.radii)}, refine {bool(args.refine)}")

    load0 = os.getloadavg()[0]
    times, tables = {}, {}
    for w in args.workers:
        cfg = config_from_dict({**base, "compute": {"backend": "processes", "workers": w, "progress": False}},
                               source="benchmark")
        search.clear_ring_caches()
        stats = []

        def runner(plan, chunks, cfg=cfg):
            from twinring.execute import run_units

            res = run_units(search.scan_chunk, plan, chunks, compute=cfg.compute, tag="chunks",
                            log=lambda msg: None)
            stats.append(res.stats)
            return [res[c] for c in chunks]

        t = time.perf_counter()
        plan, pool, cand, peaks = search.run_search(prepared, cfg.search, cfg.compute, runner=runner,
                                                    key=cfg0.hash())
        times[w] = time.perf_counter() - t
        tables[w] = (cand, peaks)
        s = stats[0]
        print(f"workers {w}: {times[w]:.2f} s wall ({len(plan.chunk_ids())} chunks, "
              f"{pool.pairs_scanned:,} pairs; chunk phase {s.wall_s:.2f} s; "
              f"peak memory {max(s.peak_main_mb, s.peak_worker_mb):.0f} MB)")

    ref_c, ref_p = tables[args.workers[0]]
    same = all(np.array_equal(np.asarray(c[col]), np.asarray(ref_c[col]), equal_nan=c[col].dtype.kind == "f")
               for c, _ in tables.values() for col in ref_c.colnames) and \
        all(np.array_equal(np.asarray(p[col]), np.asarray(ref_p[col]), equal_nan=p[col].dtype.kind == "f")
            for _, p in tables.values() for col in ref_p.colnames)
    print(f"identical tables across worker counts: {'yes' if same else 'NO'}")
    load1 = os.getloadavg()[0]
    print(f"load average (1 min) before {load0:.2f}, after {load1:.2f}, on {os.cpu_count()} cores")
    if max(load0, load1) > 0.5 + (os.cpu_count() or 1):
        print("warning: the machine was busy with other work; the wall times include waiting for a core")
    w0, w1 = args.workers[0], args.workers[-1]
    print(f"speedup: {times[w0] / times[w1]:.2f}")


if __name__ == "__main__":
    main()
