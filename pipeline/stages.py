"""The edge of the search chain: read inputs, run prepare and search, write outputs.

Handlers of ``twinring prepare`` and ``twinring search``.  Everything here is
I/O and bookkeeping; the science is in prepare.py, rings.py, statistic.py and
search.py.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from . import prepare as prep_mod
from . import search as search_mod
from .config import InputError, load_config  # noqa: F401
from .filters import filter_id, run_filter, weighting_name
from .inputs import input_files, listed_pairs, load_run_config  # noqa: F401  (stage edges use them)
from .results import provenance, write_table
from .rundir import open_run


def prepared_for(cfg, run, prepared=None):
    """The prepared map: from the config's map (written as prepared.fits in the run dir).

    ``prepared``: an already prepared map (loaded before the run dir was opened) to log and write.
    """
    if prepared is None:
        prepared = load_inputs(cfg)
    for note in getattr(prepared, "notes", ()):
        run.log(note)
    path = prep_mod.write_prepared(prepared, run.dir, provenance(cfg, input_files(cfg), "prepare"))
    run.log(f"prepared map written to {path}")
    return prepared


def load_inputs(cfg):
    """Read and prepare the config's map (and check a listed-pairs table) before any output is written."""
    if not cfg.map.path:
        raise InputError(f"{cfg.source}: map.path: found null; allowed: a HEALPix FITS file")
    prepared = prep_mod.load_and_prepare(cfg)
    listed_pairs(cfg)
    return prepared


def for_each_map(cfg, args, stage, body, consistency=True):
    """With ``map.paths``: ``body(map_cfg, map_run)`` on every map in ``<out>/maps/<name>/`` (its lines prefixed
    by the map's name), then consistency.ecsv when every map has candidates.  Returns the closing lines."""
    from .consistency import map_config, map_dir, map_list, write_consistency

    maps = map_list(cfg)                    # every file exists and names are distinct before any output
    if getattr(args, "shard", None):
        raise InputError(f"{cfg.source}: --shard: found {args.shard} with map.paths; allowed: shards of one map "
                         "(map.path), or no --shard")
    run = open_run(cfg, args.out, args.force, stage)
    lines = []
    for name, path in maps:
        mcfg = map_config(cfg, path)
        mrun = open_run(mcfg, map_dir(run.dir, name), args.force, stage)
        run.log(f"map {name}: {path}")
        for line in body(mcfg, mrun):
            mrun.log(line)
            lines.append(f"[{name}] {line}")
    if consistency and all((map_dir(run.dir, n) / "candidates.ecsv").exists() for n, _ in maps):
        lines += write_consistency(cfg, run.dir, log=run.log)
    run.finish(lines)
    return 0


def cmd_prepare(args):
    cfg = load_run_config(args)
    if cfg.map.paths:
        def body(mcfg, mrun):
            p = prepared_for(mcfg, mrun)
            return [f"prepared map: nside {p.nside}, lmax {p.lmax}, fwhm {p.fwhm_deg} deg"]
        return for_each_map(cfg, args, "prepare", body, consistency=False)
    run = open_run(cfg, args.out, args.force, "prepare")
    p = prepared_for(cfg, run)
    run.finish([f"prepared map: nside {p.nside}, lmax {p.lmax}, fwhm {p.fwhm_deg} deg, "
                f"{100 * float(np.mean(p.mask > 0.5)) if p.mask is not None else 100:.1f}% of the sky usable"])
    return 0


def search_prepared(cfg, run, prepared, runner=None):
    """Run the search on a prepared map and write candidates.ecsv and peaks.ecsv."""
    table = listed_pairs(cfg)
    warn = search_mod.grid_warning(prepared, cfg.search)
    if warn:
        run.log(warn)
    rfilt = run_filter(cfg)
    if rfilt is not None:
        run.log(f"ring weighting: the optimal filter {filter_id(cfg.prepare, rfilt)} at every radius "
                f"(search.weighting {cfg.search.weighting!r} not used)")
    plan, pool, cand, peaks = search_mod.run_search(
        prepared, cfg.search, cfg.compute, table, runner=runner, progress=run.progress, key=cfg.hash(),
        ring_filter=rfilt)
    cand.meta["grid_warning"] = warn or ""
    meta = provenance(cfg, input_files(cfg), "search")
    meta.update(family=cfg.search.family, weighting=weighting_name(cfg), filter=filter_id(cfg.prepare, rfilt),
                pairs_per_radius=int(pool.pairs_scanned // max(1, len(plan.radii_deg))),
                twist_convention="circle 1 at phase phi matches circle 2 at phi + twist (flip false) or twist - phi (flip true)",
                grid_warning=warn or "")
    meta.update({f"screen_{k}" if not k.startswith("screen") else k: v
                 for k, v in getattr(plan, "screen", {}).items() if v is not None})
    write_table(cand, run.dir / "candidates.ecsv", meta)
    write_table(peaks, run.dir / "peaks.ecsv", meta)
    return plan, pool, cand, peaks


def summary_lines(cand, pool, plan):
    from .rings import format_twist

    lines = [f"scanned {pool.pairs_scanned:,} circle pairs ({len(plan.radii_deg)} radii x both senses, all twists)",
             f"{len(cand)} candidates written"]
    if cand.meta.get("grid_warning"):
        lines.append(cand.meta["grid_warning"])
    if len(cand):
        b = cand[0]
        lines.insert(0, (f"best: s = {b['s']:.3f} at radius {b['radius_deg']:.2f} deg, centres "
                         f"({b['lon1_deg']:.1f}, {b['lat1_deg']:.1f}) & ({b['lon2_deg']:.1f}, {b['lat2_deg']:.1f}), "
                         f"twist {format_twist(b['twist_deg'])} deg, flip {bool(b['flip'])}"))
    return lines


def cmd_search(args):
    """Search; chunks are kept in the run dir (rerun resumes); ``--shard K/N`` scans one shard only."""
    from . import merge as merge_mod
    from .execute import parse_shard

    cfg = load_run_config(args)
    if cfg.map.paths:
        def body(mcfg, mrun):
            stats = []
            prepared = prepared_for(mcfg, mrun)
            plan, pool, cand, peaks = search_prepared(mcfg, mrun, prepared,
                                                      runner=merge_mod.chunk_runner(mcfg, mrun, stats))
            return summary_lines(cand, pool, plan) + [s.line() for s in stats]
        return for_each_map(cfg, args, "search", body)
    shard = parse_shard(getattr(args, "shard", None))
    prepared = load_inputs(cfg)                 # bad inputs fail before the output dir is touched
    run = open_run(cfg, args.out, args.force, "search")
    prepared_for(cfg, run, prepared)
    if shard is not None:
        plan, res = merge_mod.search_shard(cfg, run, prepared, shard, listed_pairs(cfg))
        run.finish([f"shard {shard[0]}/{shard[1]}: {len(res)} of {len(plan.chunk_ids())} chunks scanned; "
                    "combine all shards with `twinring merge`", res.stats.line()])
        return 0
    stats = []
    plan, pool, cand, peaks = search_prepared(cfg, run, prepared, runner=merge_mod.chunk_runner(cfg, run, stats))
    lines = summary_lines(cand, pool, plan) + [s.line() for s in stats]
    run.finish(lines)
    return 0


def calibrate_maps(cfg, args):
    """``twinring calibrate`` with map.paths: calibrate_run on every map's directory, then consistency.ecsv."""
    from .calibrate import calibrate_run, load_data

    def body(mcfg, mrun):
        sky, prepared = load_data(mcfg)
        return calibrate_run(mcfg, mrun, sky, prepared)
    return for_each_map(cfg, args, "calibrate", body)


def cmd_merge(args):
    """Combine finished shard directories into the tables of an unsplit run."""
    from . import calibrate

    if (Path(args.dirs[0]) / calibrate.CAL_SHARD).exists():
        run, lines = calibrate.merge_calibration_shards(args.dirs, args.out, getattr(args, "force", False))
        run.finish(lines)
        return 0
    run, plan, pool, cand, peaks = merge_shards(args.dirs, args.out, getattr(args, "force", False))
    run.finish(summary_lines(cand, pool, plan))
    return 0


def merge_shards(dirs, out, force=False, progress=True):
    """Merge finished shard directories into ``out``: the tables an unsplit run writes. Returns the stages tuple."""
    from . import execute
    from .execute import load_shard_units
    from .merge import CHUNK_TAG, check_shards, load_prepared_for_merge, plan_key, write_manifest
    from .store import refuse_out_among_inputs
    from .rundir import CONFIG_NAME

    dirs = [Path(d).expanduser() for d in dirs]
    refuse_out_among_inputs(out, dirs)
    mans = check_shards(dirs)
    first = mans[0][0]
    cfg = load_config(first / CONFIG_NAME)
    key = mans[0][1]["work_key"]
    n = mans[0][1]["shard"][1]
    prepared, _ = load_prepared_for_merge(cfg, [d for d, _ in mans])
    table = listed_pairs(cfg)
    plan = search_mod.make_plan(prepared, cfg.search, cfg.compute, table, key=cfg.hash(), ring_filter=run_filter(cfg))
    if plan_key(plan) != key:
        raise InputError(f"{first}: the stored prepared map and config give work key {plan_key(plan)}, the shards "
                         f"were made with {key}; allowed: shard directories left as `twinring search` wrote them")
    results = {}
    for d, m in mans:
        results.update(load_shard_units(d, CHUNK_TAG, m["units"], key, f"shard {m['shard'][0]}/{n}", "chunk"))
    run = open_run(cfg, out, force, "merge")
    run.log(f"merging {n} shard(s): " + ", ".join(str(d) for d, _ in mans))
    prep_mod.write_prepared(prepared, run.dir, provenance(cfg, input_files(cfg), "prepare"))
    units = plan.chunk_ids()
    for u in units:
        execute.store_unit(run.dir, CHUNK_TAG, u, results[execute._norm(u)], key)
    write_manifest(run.dir, cfg, key, None, units, units)

    def runner(plan_, chunks):
        return [results[execute._norm(c)] for c in chunks]

    plan_, pool, cand, peaks = search_prepared(cfg, run, prepared, runner=runner)
    return run, plan_, pool, cand, peaks
