"""``twinring run CONFIG``: every configured stage in order, into one run directory.

Stages, in order, and when they run:

=========  ==========================================================  ===============================
stage      does                                                        runs when
=========  ==========================================================  ===============================
sky        synthetic map (sky.fits, mask.fits) and predicted circles    map.path is null and the config
           (circles.ecsv) of the configured topology                   has a sky or topology section
prepare    prepared.fits                                               always
search     candidates.ecsv, peaks.ecsv                                 always
calibrate  thresholds.ecsv, null_peaks.ecsv; p-values in the tables    the config has a calibrate section
consistency consistency.ecsv: top candidates matched across the maps   map.paths (several maps) is given
inject     injections.ecsv, recovery.ecsv                              the config has an inject section
bound      bound.ecsv                                                  inject runs or a bound section
exclude    exclusion.ecsv (+ exclusion_summary.ecsv)                   the config has an exclude section
report     fig_*.png, summary.md, summary.json                         always
=========  ==========================================================  ===============================

Several maps (``map.paths``): prepare, search and calibrate run on each map in
its own run directory ``maps/<name>/`` (pipeline/consistency.py names them),
with the same stage functions as one map; the consistency stage compares
them and the report summarises every map and the comparison.  inject, bound
and exclude need one map (``map.path``).

For a synthetic run the stages read the sky stage's files: the resolved
config stored in the run directory has ``map.path`` (and ``map.mask`` with
``sky.mask: demo``) pointing at them.

Skipping unchanged stages
    ``stages.json`` in the run directory records, per finished stage, a key:
    the hash of the config sections the stage reads, the checksums of its
    outside input files (map, mask, listed pairs, spectrum file) and the keys
    of the stages it depends on.  A stage whose key is unchanged and whose
    outputs all exist is skipped; a stage that runs again makes every later
    stage that depends on it run again.  ``compute`` and ``output`` never enter
    a key (they do not change results).  Rerunning ``twinring run`` on a
    directory made by ``twinring run`` with a changed config is allowed: the
    keys decide what is redone.  Simulations and injected skies are stored
    per unit under their own setup key, so a stage that reruns reuses the ones
    that did not change.
"""
from __future__ import annotations

import dataclasses
import datetime as _dt
import hashlib
import json
import time
from pathlib import Path

from .config import InputError, load_config

MANIFEST = "stages.json"
ORDER = ("sky", "prepare", "search", "calibrate", "inject", "bound", "report")
# exclude: after bound; consistency: after calibrate, with map.paths only (both placed by planned_stages)

SECTIONS_READ = {
    "sky": ("topology", "sky", "cosmology"),
    "prepare": ("map", "prepare"),
    "search": ("search",),
    "calibrate": ("calibrate", "cosmology"),
    "inject": ("inject", "topology", "sky", "cosmology"),
    "bound": ("bound", "cosmology"),
    "exclude": ("exclude", "topology", "search"),
    "consistency": ("consistency", "report", "search"),
    "report": ("report",),
}
DEPENDS = {
    "sky": (),
    "prepare": ("sky",),
    "search": ("prepare",),
    "calibrate": ("search",),
    "consistency": ("search", "calibrate"),
    "inject": ("calibrate",),
    "bound": ("inject", "calibrate"),
    "exclude": ("bound",),
    "report": ("sky", "prepare", "search", "calibrate", "consistency", "inject", "bound", "exclude"),
}
OUTPUTS = {
    "sky": ("sky.fits", "circles.ecsv"),
    "prepare": ("prepared.fits", "prepared_alm.fits"),
    "search": ("candidates.ecsv", "peaks.ecsv"),
    "calibrate": ("thresholds.ecsv", "null_peaks.ecsv"),
    "consistency": ("consistency.ecsv",),
    "inject": ("injections.ecsv", "recovery.ecsv"),
    "bound": ("bound.ecsv",),
    "exclude": ("exclusion.ecsv",),
    "report": ("summary.md", "summary.json"),
}


def planned_stages(cfg) -> list:
    """The stages this config asks for, in order."""
    present = set(cfg.present)
    out = []
    if cfg.map.paths:
        from .consistency import map_list

        map_list(cfg)                       # every file exists, names distinct: before any output is written
        one = [s for s in ("inject", "bound", "exclude") if s in present]
        if one:
            raise InputError(f"{cfg.source}: {one[0]}: runs on one map; found map.paths (several maps); allowed: "
                             f"map.path, or no {', '.join(one)} section")
        out += ["prepare", "search"] + (["calibrate"] if "calibrate" in present else []) + ["consistency", "report"]
        return out
    if not cfg.map.path:
        if not ({"sky", "topology"} & present):
            raise InputError(f"{cfg.source}: map.path: found null; allowed: a HEALPix FITS file, or a sky / "
                             "topology section for a synthetic sky")
        out.append("sky")
    out += ["prepare", "search"]
    if "calibrate" in present:
        out.append("calibrate")
    if "inject" in present:
        if "calibrate" not in present:
            raise InputError(f"{cfg.source}: inject: needs a calibrate section (detection thresholds); "
                             "allowed: add `calibrate:` to the config")
        out.append("inject")
    if "inject" in present or "bound" in present:
        if "inject" not in present:
            raise InputError(f"{cfg.source}: bound: needs an inject section (recovery); allowed: add `inject:`")
        out.append("bound")
    if "exclude" in present:
        if cfg.exclude.alpha_min_deg is None and "bound" not in out:
            raise InputError(f"{cfg.source}: exclude.alpha_min_deg: found null and no bound stage; allowed: a "
                             "radius in degrees, or inject and bound sections")
        out.append("exclude")
    out.append("report")
    return out


def effective_config(cfg, run_dir: Path):
    """The config the stages use: a synthetic run reads the sky stage's map and mask."""
    if cfg.map.path or cfg.map.paths:
        return cfg
    sky = str(run_dir / "sky.fits")
    mask = str(run_dir / "mask.fits") if cfg.sky.mask == "demo" else cfg.map.mask
    present = tuple(cfg.present) + (() if "map" in cfg.present else ("map",))
    return dataclasses.replace(cfg, map=dataclasses.replace(cfg.map, path=sky, mask=mask), present=present)


def _checksum(path):
    from .results import file_checksum

    return file_checksum(path) if path and Path(path).exists() else None


def stage_key(name, cfg, keys) -> str:
    """Key of a stage: its config sections, outside inputs and upstream keys."""
    d = cfg.to_dict()
    blob = {"sections": {s: d[s] for s in SECTIONS_READ[name]},
            "upstream": {u: keys.get(u) for u in DEPENDS[name]}}
    if name == "prepare":
        blob["inputs"] = {"map": _checksum(cfg.map.path), "mask": _checksum(cfg.map.mask)}
        if cfg.map.paths:
            from .consistency import map_list

            blob["inputs"]["maps"] = {n: _checksum(p) for n, p in map_list(cfg)}
    if name == "search":
        blob["inputs"] = {"listed": _checksum(cfg.search.listed)}
    if name == "calibrate":
        blob["inputs"] = {"spectrum": _checksum(cfg.calibrate.spectrum_file)}
    if name == "exclude":
        blob["inputs"] = {"points": _checksum(cfg.exclude.points)}
    raw = json.dumps(blob, sort_keys=True, default=str).encode()
    return hashlib.sha256(raw).hexdigest()[:16]


def read_manifest(run_dir) -> dict:
    p = Path(run_dir) / MANIFEST
    if not p.exists():
        return {}
    try:
        data = json.loads(p.read_text())
    except (OSError, ValueError):
        return {}
    return data.get("stages", {}) if isinstance(data, dict) else {}


def write_manifest(run_dir, stages: dict):
    from .rundir import write_json

    write_json(Path(run_dir) / MANIFEST, {"tool": "twinring", "stages": stages})


def _outputs(name, cfg):
    out = list(OUTPUTS[name])
    if name == "sky" and cfg.sky.mask == "demo":
        out.append("mask.fits")
    if cfg.map.paths and name in PER_MAP:
        from .consistency import MAPS_DIR, map_list

        out = [f"{MAPS_DIR}/{n}/{f}" for n, _ in map_list(cfg) for f in out]
    return out


def up_to_date(name, key, manifest, run_dir, cfg) -> bool:
    rec = manifest.get(name)
    return bool(rec and rec.get("key") == key and all((Path(run_dir) / f).exists() for f in _outputs(name, cfg)))


# --------------------------------------------------------------------------- stage bodies
class _State:
    """What the stages hand on to each other within one `twinring run`."""

    def __init__(self):
        self.prepared = None
        self.sky = None
        self.maps = {}          # several maps: one _State per map name


def _do_sky(cfg, run, state):
    from .topology.stages import run_predict, run_sky

    paths = run_sky(cfg, run.dir)
    run_predict(cfg, run.dir)
    return [f"synthetic sky: {', '.join(str(p) for p in paths.values())}; predicted circles: circles.ecsv"]


def _prepared(cfg, run, state):
    from .prepare import read_prepared

    if state.prepared is None:
        state.prepared = read_prepared(run.dir)
    return state.prepared


def _data_sky(cfg, state):
    from .skymap import load_config_map

    if state.sky is None:
        state.sky = load_config_map(cfg.map)
    return state.sky


def _do_prepare(cfg, run, state):
    from .stages import load_inputs, prepared_for

    state.prepared = prepared_for(cfg, run, load_inputs(cfg))
    p = state.prepared
    return [f"prepared map: nside {p.nside}, lmax {p.lmax}, fwhm {p.fwhm_deg} deg"]


def _do_search(cfg, run, state):
    from . import merge as merge_mod
    from .stages import search_prepared, summary_lines

    stats = []
    plan, pool, cand, peaks = search_prepared(cfg, run, _prepared(cfg, run, state),
                                              runner=merge_mod.chunk_runner(cfg, run, stats))
    return summary_lines(cand, pool, plan) + [s.line() for s in stats]


def _do_calibrate(cfg, run, state):
    from .calibrate import calibrate_run

    return calibrate_run(cfg, run, _data_sky(cfg, state), _prepared(cfg, run, state))


def _do_inject(cfg, run, state):
    from .inject import inject_run

    return inject_run(cfg, run, _data_sky(cfg, state))


def _do_bound(cfg, run, state):
    from .bound import bound_run

    return bound_run(cfg, run)


def _do_report(cfg, run, state):
    from .report import make_report

    s = make_report(run.dir, cfg, log=run.log)
    return [f"figure: {f}" for f in s["figures"]] + [s["headline"]]


def _do_exclude(cfg, run, state):
    from .exclude import exclude_run

    return exclude_run(cfg, run)


def _do_consistency(cfg, run, state):
    from .consistency import write_consistency

    return write_consistency(cfg, run.dir)


BODIES = {"sky": _do_sky, "prepare": _do_prepare, "search": _do_search, "calibrate": _do_calibrate,
          "consistency": _do_consistency, "inject": _do_inject, "bound": _do_bound, "exclude": _do_exclude,
          "report": _do_report}
PER_MAP = ("prepare", "search", "calibrate")      # with map.paths: run on every map, each in maps/<name>/


def _per_map(name):
    """The body of a per-map stage with map.paths: the one-map body on every map, in maps/<name>/."""
    body = BODIES[name]

    def each(cfg, run, state):
        from .consistency import map_config, map_dir, map_list
        from .rundir import open_run

        lines = []
        for mname, path in map_list(cfg):
            mcfg = map_config(cfg, path)
            mrun = open_run(mcfg, map_dir(run.dir, mname), True, name)
            mstate = state.maps.setdefault(mname, _State())
            run.log(f"map {mname}: {path}")
            out = body(mcfg, mrun, mstate)
            mrun.log_summary(out)
            lines += [f"[{mname}] {line}" for line in out]
        return lines
    return each


def _body(name, cfg):
    if not cfg.map.paths:
        return BODIES[name]
    if name in PER_MAP:
        return _per_map(name)
    if name == "report":
        return _report_maps
    return BODIES[name]


def _report_maps(cfg, run, state):
    """Report of a several-map run: each map's own report in maps/<name>/, then the top-level summary."""
    from .consistency import map_config, map_dir, map_list
    from .report import make_report

    lines = []
    for mname, path in map_list(cfg):
        s = make_report(map_dir(run.dir, mname), map_config(cfg, path))
        lines.append(f"[{mname}] {s['headline']}")
    s = make_report(run.dir, cfg, log=run.log)
    return lines + [s["headline"]]


# --------------------------------------------------------------------------- the command
def run_workflow(cfg, out=None, force=False, echo=print) -> dict:
    """Run every planned stage; return ``{stage: 'ran' | 'skipped'}``."""
    from .rundir import open_run, resolve_out

    stages = planned_stages(cfg)
    run_dir = resolve_out(cfg, out).resolve()
    ecfg = effective_config(cfg, run_dir)
    manifest = read_manifest(run_dir)
    # a directory made by `twinring run` may be rerun with a changed config: the stage keys decide
    run = open_run(ecfg, run_dir, force or bool(manifest), "run")
    if manifest and not force:
        run.log("rerun of a `twinring run` directory: stages with unchanged keys are skipped")
    state = _State()
    keys, status = {}, {}
    for name in stages:
        key = stage_key(name, ecfg, keys)
        keys[name] = key
        if up_to_date(name, key, manifest, run_dir, ecfg):
            status[name] = "skipped"
            run.log(f"{name}: unchanged (key {key}), skipped")
            echo(f"[{name}] unchanged, skipped")
            continue
        echo(f"[{name}] running")
        t0 = time.time()
        srun = open_run(ecfg, run_dir, True, name)
        lines = _body(name, ecfg)(ecfg, srun, state)
        dt = time.time() - t0
        srun.log_summary(lines)
        for line in lines:
            echo(f"  {line}")
        echo(f"  ({dt:.1f} s)")
        manifest[name] = {"key": key, "seconds": round(dt, 2),
                          "finished": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
                          "outputs": _outputs(name, ecfg)}
        write_manifest(run_dir, manifest)
        status[name] = "ran"
    return status


def cmd_run(args):
    from .rundir import peak_memory_mb

    cfg = load_config(args.config)
    t0 = time.time()
    status = run_workflow(cfg, args.out, args.force)
    ran = [k for k, v in status.items() if v == "ran"]
    skipped = [k for k, v in status.items() if v == "skipped"]
    print(f"stages run: {', '.join(ran) or 'none'}" + (f"; unchanged: {', '.join(skipped)}" if skipped else ""))
    print(f"wall time {time.time() - t0:.1f} s, peak memory {peak_memory_mb():.0f} MB")
    return 0
