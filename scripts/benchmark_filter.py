"""Median S on predicted circle pairs of full-physics skies, without and with the multipole filter.

1.2 chi cubic torus (E1), off-centre observer (0.21, 0.13, 0.07) chi, Gaussian beam 2 deg, lmax 64,
no noise, no mask.  For every sky (seeds 1..N) and every predicted pair the best S over twists at the
predicted sense is taken (twinring.statistic.s_curve on rings sampled exactly from the a_lm), for
the |m| and the flat ring weighting, with ``prepare.filter`` none and optimal (the filter prepare
applies: twinring.filters.filter_window).  Pairs group by radius: 53.1 deg (faces) and 31.9 deg (edges).
Beside the measurement: the expected S of a true pair from the decomposition (twinring.filters.expected_s).
Same seed: the same sky in sw physics gives the matched-limit reference.

    python scripts/benchmark_filter.py [n_skies]
"""
import math
import sys
import time

import numpy as np
import healpy as hp

from twinring import filters as F
from twinring import rings
from twinring.config import PrepareSection
from twinring.statistic import s_curve
from twinring.topology import manifolds as M
from twinring.topology import skies as S
from twinring.topology.circles import predict_pairs

LMAX, NSIDE, FWHM = 64, 64, 2.0
NSAMP = 256


def pair_s(alm, row, weighting):
    c1 = rings.lonlat_to_vec(row["lon1_deg"], row["lat1_deg"])
    c2 = rings.lonlat_to_vec(row["lon2_deg"], row["lat2_deg"])
    a = math.radians(row["radius_deg"])
    t1, _ = rings.sample_rings(alm, LMAX, c1, a, NSAMP, other=c2)
    t2, _ = rings.sample_rings(alm, LMAX, c2, a, NSAMP, other=c1)
    return float(np.max(s_curve(t1[0], t2[0], bool(row["flip"]), weighting=weighting)))


def main(n_skies=4):
    t0 = time.time()
    sp = M.build_space("E1", [1.2, 1.2, 1.2], observer=(0.21, 0.13, 0.07))
    rows = predict_pairs(sp)
    radii = np.array([r["radius_deg"] for r in rows])
    bl = hp.gauss_beam(math.radians(FWHM), lmax=LMAX)
    filt = {"none": None, "optimal": F.filter_window(PrepareSection(nside=NSIDE, lmax=LMAX, fwhm_deg=FWHM,
                                                                     filter="optimal"))}
    split = F.source_split(LMAX)
    res = {}
    for seed in range(1, n_skies + 1):
        for physics in ("full", "sw"):
            _, alm = S.make_sky(sp, nside=NSIDE, lmax=LMAX, fwhm_deg=0.0, physics=physics, seed=seed,
                                return_alm=True)
            for fname, f in filt.items():
                a = hp.almxfl(alm, bl if f is None else bl * f)
                for w in ("m", "flat"):
                    for r, row in zip(radii, rows):
                        res.setdefault((physics, fname, w, round(r, 1)), []).append(pair_s(a, row, w))
    print(f"# E1 1.2 chi, observer off centre, beam {FWHM} deg, lmax {LMAX}; {n_skies} skies "
          f"({time.time() - t0:.0f} s)")
    print(f"# filter: {F.filter_hash(filt['optimal'])}  f_l at l=2,5,10,20,40,64: "
          + " ".join(f"{filt['optimal'][l]:.2f}" for l in (2, 5, 10, 20, 40, 64)))
    print("physics filter weighting radius_deg n_pairs median_S mean_S expected_S(model)")
    for (physics, fname, w, r), v in sorted(res.items()):
        e = F.expected_s(split, r, filt[fname], bl, None, w)[0] if physics == "full" else float("nan")
        print(f"{physics:5s} {fname:8s} {w:5s} {r:5.1f} {len(v):4d} {np.median(v):6.3f} {np.mean(v):6.3f} {e:6.3f}")
    for w in ("m", "flat"):
        print(f"median_S_full weighting={w} " + " ".join(
            f"{fname}@{r:.0f}={np.median(res[('full', fname, w, round(r, 1))]):.3f}"
            for fname in filt for r in sorted(set(np.round(radii, 1)))))


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 4)
