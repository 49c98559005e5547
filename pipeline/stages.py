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
from .config import InputError, load_config
from .results import provenance, read_table, write_table
from .rundir import open_run, write_json


def load_run_config(args, overrides=None):
    return load_config(args.config, overrides)


def input_files(cfg):
    return {"map": cfg.map.path, "mask": cfg.map.mask, "listed": cfg.search.listed}


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


def cmd_prepare(args):
    cfg = load_run_config(args)
    run = open_run(cfg, args.out, args.force, "prepare")
    p = prepared_for(cfg, run)
    run.finish([f"prepared map: nside {p.nside}, lmax {p.lmax}, fwhm {p.fwhm_deg} deg, "
                f"{100 * float(np.mean(p.mask > 0.5)) if p.mask is not None else 100:.1f}% of the sky usable"])
    return 0


def listed_pairs(cfg):
    if cfg.search.family != "listed":
        return None
    t = read_table(cfg.search.listed, "search.listed table")
    need = {"lon1_deg", "lat1_deg", "lon2_deg", "lat2_deg"}
    missing = sorted(need - set(t.colnames))
    if missing:
        raise InputError(f"{cfg.search.listed}: search.listed table lacks columns {', '.join(missing)}; "
                         f"allowed: a table with {', '.join(sorted(need))}")
    if len(t) == 0:
        raise InputError(f"{cfg.search.listed}: search.listed table has no rows; allowed: at least one circle pair")
    return t


def search_prepared(cfg, run, prepared, runner=None):
    """Run the search on a prepared map and write candidates.ecsv and peaks.ecsv."""
    table = listed_pairs(cfg)
    warn = search_mod.grid_warning(prepared, cfg.search)
    if warn:
        run.log(warn)
    plan, pool, cand, peaks = search_mod.run_search(
        prepared, cfg.search, cfg.compute, table, runner=runner, progress=run.progress, key=cfg.hash())
    cand.meta["grid_warning"] = warn or ""
    meta = provenance(cfg, input_files(cfg), "search")
    meta.update(family=cfg.search.family, weighting=cfg.search.weighting, pairs_per_radius=int(pool.pairs_scanned // max(1, len(plan.radii_deg))),
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


def cmd_merge(args):
    """Combine finished shard directories into the tables of an unsplit run."""
    from . import merge as merge_mod
    from . import calibrate

    if (Path(args.dirs[0]) / calibrate.CAL_SHARD).exists():
        run, lines = calibrate.merge_calibration_shards(args.dirs, args.out, getattr(args, "force", False))
        run.finish(lines)
        return 0
    run, plan, pool, cand, peaks = merge_mod.merge_shards(args.dirs, args.out, getattr(args, "force", False))
    run.finish(summary_lines(cand, pool, plan))
    return 0
