"""The smallest detectable circle radius alpha_min of full-physics cubic tori, per filter.

One campaign, run through twinring's own stages (calibrate, inject, bound) once per filter, on
the same skies and the same simulations (fixed seeds):

* survey: the demo survey's instrument (Nside 64, 2 deg beam, 40 uK-arcmin white noise, the demo
  mask), prepared to a 3 deg beam, lmax 128;
* null: isotropic Gaussian skies of CAMB's spectrum with the same beam, noise and mask
  (calibrate.spectrum theory; 100 by default), antipodal search, nside_centers 32, radii 56-79 deg step 1;
* injections: E1 cubic tori in full physics (CAMB: Sachs-Wolfe, Doppler, ISW), random orientation,
  sizes with face circles at the campaign radii (by default 69-76 deg, 1 deg apart: about where
  alpha_min falls for this survey), targeted recovery against the global thresholds;
* alpha_min: the bound stage's rule (one-sided 95 % lower limit of the recovered fraction >=
  bound.recovery).

Filters: ``optimal`` (prepare.filter: optimal), ``none`` (|m| ring weighting, the default),
``flat`` (no filter, flat ring weighting), ``multipole`` (prepare.filter: multipole, |m|).

    python scripts/benchmark_filters.py [realizations] [simulations] [filter,filter,...]
    python scripts/benchmark_filters.py 8 20 optimal,none --radii 60,62.5,65,67.5,70,72.5,75   # small, wider
    python scripts/benchmark_filters.py --from /tmp/twinring-filters-XXXX   # re-read a finished run

Prints per filter and radius the recovered count, its one-sided 95 % lower limit, the mean S of the
injections against the threshold there; then, for the optimal filter against each other filter, the
paired differences (same skies, same simulations); then the alpha_min line.

Paired differences.  The filters see the very same injected skies and null simulations, so their
difference is measured far more precisely than either filter's margin:

* dS: mean over the injections of S(optimal) - S(other) on the same sky, with its standard error;
* dNull: mean over the simulations of the difference of their largest S at that radius (both senses),
  with its standard error: the smooth part of the threshold difference.  The thresholds themselves
  rest on the tail of 40 simulations per radius and scatter by a few hundredths from radius to
  radius; dNull is the radius-by-radius estimate with that tail noise averaged out;
* dMargin = dS - dNull (standard errors added in quadrature; the injections and the simulations
  are independent).
"""
from __future__ import annotations

import math
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import yaml
from astropy.table import Table

RADII = [69.0, 70.0, 71.0, 72.0, 73.0, 74.0, 75.0, 76.0]   # 1 deg apart, about the alpha_min of this survey
RECOVERY = 0.9            # 29 of 29 recovered give a one-sided 95 % lower limit above 0.9
FILTERS = {
    "optimal": dict(prepare={"filter": "optimal"}, search={"weighting": "m"}),
    "none": dict(prepare={"filter": "none"}, search={"weighting": "m"}),
    "flat": dict(prepare={"filter": "none"}, search={"weighting": "flat"}),
    "multipole": dict(prepare={"filter": "multipole"}, search={"weighting": "m"}),
}


def config(name, out, realizations, sims, radii=RADII):
    f = FILTERS[name]
    return {
        # the data sky: a torus too large to show circles (L > 2 chi); injections take the shape, not the size
        "topology": {"space": "E1", "lengths": [2.5, 2.5, 2.5], "units": "chi"},
        "sky": {"nside": 64, "lmax": 128, "fwhm_deg": 2.0, "physics": "full", "seed": 2027, "noise_uk_arcmin": 40.0,
                "mask": "demo", "mask_band_deg": 10.0, "mask_holes": 40, "mask_hole_deg": 1.5},
        "prepare": {"nside": 64, "lmax": 128, "fwhm_deg": 3.0, "input_fwhm_deg": 2.0, **f["prepare"]},
        "search": {"family": "antipodal", "nside_centers": 32, "radius_deg": [56.0, 79.0, 1.0], "top": 5,
                   **f["search"]},
        "calibrate": {"simulations": sims, "spectrum": "theory", "noise_uk_arcmin": 40.0,
                      "false_alarm": [0.05], "significance": 0.05, "seed": 7},
        "inject": {"radii_deg": list(radii), "realizations": realizations, "mode": "targeted", "seed": 11,
                   "physics": "full"},
        "bound": {"recovery": RECOVERY},
        "compute": {"backend": "processes", "workers": 2, "memory_gb": 4},
        "output": {"dir": str(out)},
    }


def paired(a, b, col, key=("size_index", "realization")):
    """Per radius: mean and standard error of a[col] - b[col] over rows matched on ``key``."""
    ka = {tuple(int(r[k]) for k in key): r for r in a}
    out = {}
    for r in b:
        k = tuple(int(r[c]) for c in key)
        if k in ka:
            d = float(ka[k][col]) - float(r[col])
            if math.isfinite(d):
                out.setdefault(round(float(r["radius_deg"]), 6), []).append(d)
    return {rad: (float(np.mean(v)), float(np.std(v, ddof=1) / math.sqrt(len(v))) if len(v) > 1 else float("nan"),
                  len(v)) for rad, v in out.items()}


def null_max(t):
    """{(sim, radius): largest S over both senses} from a null_peaks table."""
    out = {}
    for r in t:
        k = (int(r["sim"]), round(float(r["radius_deg"]), 6))
        out[k] = max(out.get(k, -np.inf), float(r["s_max"]))
    return out


def paired_null(a, b):
    """Per radius: mean and standard error over simulations of the difference of their largest S."""
    ma, mb = null_max(a), null_max(b)
    per = {}
    for k, v in ma.items():
        if k in mb and math.isfinite(v - mb[k]):
            per.setdefault(k[1], []).append(v - mb[k])
    return {rad: (float(np.mean(v)), float(np.std(v, ddof=1) / math.sqrt(len(v))), len(v)) for rad, v in per.items()}


def at_radius(d, radius):
    """(mean, standard error, n) of ``d`` at ``radius``: linear between the neighbouring searched radii
    (the injections sit between grid radii), the larger of their two standard errors."""
    keys = sorted(d)
    if not keys or radius < keys[0] - 1e-6 or radius > keys[-1] + 1e-6:
        return (float("nan"), float("nan"), 0)
    hi = next(k for k in keys if k >= radius - 1e-6)
    lo = max(k for k in keys if k <= radius + 1e-6)
    if hi - lo < 1e-6:
        return d[lo]
    t = (radius - lo) / (hi - lo)
    return ((1 - t) * d[lo][0] + t * d[hi][0], max(d[lo][1], d[hi][1]), min(d[lo][2], d[hi][2]))


def report_paired(dirs, base="optimal"):
    """Print the paired differences of ``base`` against every other filter run in ``dirs``."""
    if base not in dirs:
        return
    inj = {n: Table.read(d / "injections.ecsv") for n, d in dirs.items()}
    null = {n: Table.read(d / "null_peaks.ecsv") for n, d in dirs.items()}
    print(f"paired: {base} minus other, same skies and simulations (mean +- standard error, n)")
    print("other radius_deg dS dNull dMargin")
    for other in dirs:
        if other == base:
            continue
        ds = paired(inj[base], inj[other], "s")
        dn = paired_null(null[base], null[other])
        for rad in sorted(ds):
            m_s, e_s, n_s = ds[rad]
            m_n, e_n, n_n = at_radius(dn, rad)
            print(f"{other:9s} {rad:5.1f} {m_s:+.3f}+-{e_s:.3f} (n {n_s}) {m_n:+.3f}+-{e_n:.3f} (n {n_n}) "
                  f"{m_s - m_n:+.3f}+-{math.hypot(e_s, e_n):.3f}")


def main(realizations=29, sims=100, names=tuple(FILTERS), radii=RADII):
    t0 = time.time()
    load = open("/proc/loadavg").read().split()[0]
    work = Path(tempfile.mkdtemp(prefix="twinring-filters-"))
    res = {}
    for name in names:
        out = work / name
        cfg_path = work / f"{name}.yaml"
        cfg_path.write_text(yaml.safe_dump(config(name, out, realizations, sims, radii)))
        t = time.time()
        p = subprocess.run([sys.executable, "-c", "import sys; from twinring.cli import main; sys.exit(main())",
                            "run", str(cfg_path), "--out", str(out)],
                           capture_output=True, text=True)
        if p.returncode != 0:
            sys.exit(f"{name}: twinring run failed:\n{p.stderr[-2000:]}")
        rec = Table.read(out / "recovery.ecsv")
        inj = Table.read(out / "injections.ecsv")
        bnd = Table.read(out / "bound.ecsv")
        res[name] = (rec, inj, float(bnd["alpha_min_deg"][0]), rec.meta.get("filter", "?"), time.time() - t)
        print(f"# {name}: {time.time() - t:.0f} s, filter {rec.meta.get('filter', '?')}", flush=True)
    print(f"# E1 cubic tori, full physics, demo survey (2 deg beam, 40 uK-arcmin, demo mask) prepared to 3 deg, "
          f"lmax 128; {sims} simulations, {realizations} skies per radius; bound.recovery {RECOVERY}; "
          f"{time.time() - t0:.0f} s, load {load} at start")
    print("filter radius_deg size_chi recovered n lower95 mean_S threshold mean_margin")
    for name, (rec, inj, amin, fid, _) in res.items():
        for row in rec:
            r = float(row["radius_deg"])
            sel = np.isclose(np.asarray(inj["radius_deg"], float), r)
            s = np.asarray(inj["s"], float)[sel]
            thr = np.asarray(inj["s_threshold"], float)[sel]
            ok = np.isfinite(s) & np.isfinite(thr)
            ms = float(np.mean(s[ok])) if ok.any() else float("nan")
            mt = float(np.mean(thr[ok])) if ok.any() else float("nan")
            print(f"{name:9s} {r:5.1f} {2 * math.cos(math.radians(r)):.3f} {int(row['detected']):3d} "
                  f"{int(row['n']):3d} {float(row['lower_95']):.3f} {ms:.3f} {mt:.3f} {ms - mt:+.3f}")
    report_paired({name: work / name for name in res})
    print("alpha_min " + " ".join(f"{name}={res[name][2]:.1f}" for name in res))


def reread(work):
    """The paired report and the alpha_min line of a finished run directory."""
    work = Path(work)
    found = {p.name: p for p in work.iterdir() if p.is_dir() and (p / "recovery.ecsv").exists()}
    order = list(FILTERS)
    dirs = {n: found[n] for n in sorted(found, key=lambda n: (order.index(n) if n in order else len(order), n))}
    if not dirs:
        sys.exit(f"{work}: no finished filter runs (directories with recovery.ecsv) found")
    report_paired(dirs)
    amin = {n: float(Table.read(d / "bound.ecsv")["alpha_min_deg"][0]) for n, d in dirs.items()}
    print("alpha_min " + " ".join(f"{n}={v:.1f}" for n, v in amin.items()))


if __name__ == "__main__":
    import argparse

    ap = argparse.ArgumentParser(description="alpha_min of full-physics cubic tori per filter")
    ap.add_argument("realizations", nargs="?", type=int, default=29, help="injected skies per radius")
    ap.add_argument("simulations", nargs="?", type=int, default=100, help="calibration simulations")
    ap.add_argument("filters", nargs="?", default=",".join(FILTERS), help="comma-separated: " + ", ".join(FILTERS))
    ap.add_argument("--radii", default=",".join(f"{r:g}" for r in RADII),
                    help="injection radii in degrees, comma-separated (within the searched 56-79 deg)")
    ap.add_argument("--from", dest="reread", metavar="DIR", help="re-read a finished run directory instead")
    args = ap.parse_args()
    if args.reread:
        reread(args.reread)
        sys.exit(0)
    names = tuple(args.filters.split(","))
    bad = [n for n in names if n not in FILTERS]
    if bad:
        ap.error(f"unknown filter {bad[0]}; allowed: {', '.join(FILTERS)}")
    try:
        radii = [float(x) for x in args.radii.split(",")]
    except ValueError:
        ap.error(f"--radii: found {args.radii!r}; allowed: comma-separated degrees")
    if not all(56.0 <= r <= 79.0 for r in radii):
        ap.error(f"--radii: found {args.radii}; allowed: degrees within the searched 56-79")
    main(args.realizations, args.simulations, names, radii)
