"""The inputs a run config names: the config itself, its input files, the listed pairs table.

Edge I/O shared by every stage; imports no stage module (so stages, calibrate, inject, bound and
exclude can all use it without import cycles).
"""
from __future__ import annotations

from .config import InputError, load_config
from .results import read_table


def load_run_config(args, overrides=None):
    return load_config(args.config, overrides)


def input_files(cfg):
    return {"map": cfg.map.path, "mask": cfg.map.mask, "listed": cfg.search.listed}


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
