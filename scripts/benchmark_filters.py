"""The smallest detectable circle radius alpha_min of full-physics cubic tori, per filter.

One campaign, run through twinring's own stages (calibrate, inject, bound) once per filter, on
the same skies and the same simulations (fixed seeds):

* survey: the demo survey's instrument (Nside 64, 2 deg beam, 40 uK-arcmin white noise, the demo
  mask), prepared to a 3 deg beam, lmax 128;
* null: isotropic Gaussian skies of CAMB's spectrum with the same beam, noise and mask
  (calibrate.spectrum theory), antipodal search, nside_centers 32, radii 56-79 deg step 1;
* injections: E1 cubic tori in full physics (CAMB: Sachs-Wolfe, Doppler, ISW), random orientation,
  sizes with face circles at the campaign radii, targeted recovery against the global thresholds;
* alpha_min: the bound stage's rule (one-sided 95 % lower limit of the recovered fraction >=
  bound.recovery).

Filters: ``optimal`` (prepare.filter: optimal), ``none`` (|m| ring weighting, the default),
``flat`` (no filter, flat ring weighting), ``multipole`` (prepare.filter: multipole, |m|).

    python scripts/benchmark_filters.py [realizations] [simulations] [filter,filter,...]

Prints per filter and radius the recovered count, its one-sided 95 % lower limit, the mean S of the
injections against the threshold there, then the alpha_min line.
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

RADII = [60.0, 62.5, 65.0, 67.5, 70.0, 72.5, 75.0]
RECOVERY = 0.9            # 29 of 29 recovered give a one-sided 95 % lower limit above 0.9
FILTERS = {
    "optimal": dict(prepare={"filter": "optimal"}, search={"weighting": "m"}),
    "none": dict(prepare={"filter": "none"}, search={"weighting": "m"}),
    "flat": dict(prepare={"filter": "none"}, search={"weighting": "flat"}),
    "multipole": dict(prepare={"filter": "multipole"}, search={"weighting": "m"}),
}


def config(name, out, realizations, sims):
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
        "inject": {"radii_deg": RADII, "realizations": realizations, "mode": "targeted", "seed": 11,
                   "physics": "full"},
        "bound": {"recovery": RECOVERY},
        "compute": {"backend": "processes", "workers": 2, "memory_gb": 4},
        "output": {"dir": str(out)},
    }


def main(realizations=29, sims=40, names=tuple(FILTERS)):
    t0 = time.time()
    load = open("/proc/loadavg").read().split()[0]
    work = Path(tempfile.mkdtemp(prefix="twinring-filters-"))
    res = {}
    for name in names:
        out = work / name
        cfg_path = work / f"{name}.yaml"
        cfg_path.write_text(yaml.safe_dump(config(name, out, realizations, sims)))
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
    print("alpha_min " + " ".join(f"{name}={res[name][2]:.1f}" for name in res))


if __name__ == "__main__":
    a = [int(x) for x in sys.argv[1:3]]
    if len(sys.argv) > 3:
        a.append(tuple(sys.argv[3].split(",")))
    main(*a)
