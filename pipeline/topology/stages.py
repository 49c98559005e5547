"""Stage edges of the topology engine: ``predict`` (circles.ecsv) and ``sky`` (sky.fits, mask.fits).

``run_predict(cfg, out_dir)`` reads ``cfg.topology`` (space, lengths,
angles_deg, units, observer, euler_deg) and ``cfg.cosmology`` (only for
``units: Gpc``).  ``run_sky(cfg, out_dir)`` reads the same plus ``cfg.sky``
(nside, lmax, lmin, fwhm_deg, physics, seed, noise_uk_arcmin, mask,
mask_band_deg, mask_holes, mask_hole_deg, kmax_factor, open_length_chi) and
``cfg.compute`` (memory_gb for the mode-count check, threads).
"""
from __future__ import annotations

import json
import time
from pathlib import Path

import numpy as np

from ..config import InputError
from ..results import provenance, write_table
from .circles import predict_circles
from .manifolds import space_from_config
from .skies import SkyParamError, SkyRecipe, check_sky, make_sky, mask_for_seed


def _fmt(v):
    return repr(v) if isinstance(v, str) else json.dumps(v, default=str)


def _topology_meta(cfg, space):
    from ..cosmology import chi_ls_gpc

    t = cfg.topology
    meta = {
        "units": t.units,
        "lengths": list(t.lengths),
        "observer": list(t.observer),
        "euler_deg": list(t.euler_deg),
    }
    if t.units == "Gpc":
        meta["chi_ls_gpc"] = chi_ls_gpc(cfg.cosmology)
    return meta


def recipe_from_config(cfg) -> SkyRecipe:
    s = cfg.sky
    return SkyRecipe(nside=s.nside, lmax=s.lmax, fwhm_deg=s.fwhm_deg, physics=s.physics, seed=s.seed,
                     noise_uk_arcmin=s.noise_uk_arcmin, lmin=s.lmin, kmax_factor=s.kmax_factor,
                     open_length=s.open_length_chi)


def checked_sky_inputs(cfg):
    """(space, recipe) after every check that needs no heavy work; InputError naming the key otherwise."""
    space = space_from_config(cfg.topology, cfg.cosmology, cfg.source)
    recipe = recipe_from_config(cfg)
    try:
        check_sky(space, recipe, memory_gb=cfg.compute.memory_gb)
    except SkyParamError as exc:
        section = "topology" if exc.key == "angles_deg" else "sky"
        found = exc.found if exc.found is not None else getattr(cfg.sky, exc.key, None)
        raise InputError(f"{cfg.source}: {section}.{exc.key}: found {_fmt(found)}; allowed: {exc.allowed}")
    return space, recipe


def run_predict(cfg, out_dir) -> Path:
    """Write ``circles.ecsv`` (+ ``circles.fits``) for the configured space and observer."""
    space = space_from_config(cfg.topology, cfg.cosmology, cfg.source)
    table = predict_circles(space)
    table.meta.update(_topology_meta(cfg, space))
    path = Path(out_dir) / "circles.ecsv"
    write_table(table, path, meta=provenance(cfg, stage="predict"))
    return path


def run_sky(cfg, out_dir) -> dict:
    """Write ``sky.fits`` (uK, RING) and, with ``sky.mask: demo``, ``mask.fits``; return their paths."""
    from .. import skymap
    from ..cosmology import chi_ls_gpc, t0_uk

    space, recipe = checked_sky_inputs(cfg)
    t_start = time.perf_counter()
    m = make_sky(space, nside=recipe.nside, lmax=recipe.lmax, fwhm_deg=recipe.fwhm_deg, physics=recipe.physics,
                 seed=recipe.seed, noise_uk_arcmin=recipe.noise_uk_arcmin, lmin=recipe.lmin,
                 kmax_factor=recipe.kmax_factor, open_length=recipe.open_length, cosmo=cfg.cosmology,
                 nthreads=cfg.compute.threads)
    elapsed = time.perf_counter() - t_start
    t = cfg.topology
    header = [
        ("SPACE", space.name, "flat space (Riazuelo et al. 2004 numbering)"),
        ("LENGTHS", json.dumps(list(t.lengths)), f"generator lengths, units {t.units}"),
        ("LUNITS", t.units, "units of LENGTHS and OBSERVER"),
        ("ANGLES", json.dumps(None if t.angles_deg is None else list(t.angles_deg)), "lattice/twist angles, deg"),
        ("OBSERVER", json.dumps(list(t.observer)), "observer, domain frame"),
        ("EULER", json.dumps(list(t.euler_deg)), "domain rotation z-y-z, deg"),
        ("PHYSICS", recipe.physics, "sw: Sachs-Wolfe thin shell; full: CAMB transfer"),
        ("SEED", recipe.seed, "numpy SeedSequence seed"),
        ("LMAX", recipe.lmax, "band limit of the map"),
        ("LMIN", recipe.lmin, "multipoles below are zero"),
        ("FWHM_DEG", recipe.fwhm_deg, "Gaussian beam FWHM, deg"),
        ("NOISE", recipe.noise_uk_arcmin, "white noise, uK-arcmin"),
        ("KMAXFAC", recipe.kmax_factor, "modes kept to |k| chi = KMAXFAC * LMAX"),
        ("OPENLEN", recipe.open_length, "stand-in period of open directions, chi"),
        ("CHI_GPC", round(chi_ls_gpc(cfg.cosmology), 6), "distance to last scattering, Gpc"),
        ("TCMB_UK", t0_uk(cfg.cosmology), "CMB temperature, uK"),
        ("HOLONOM", space.holonomy_order(), "holonomy group order"),
        ("SKYSECS", round(elapsed, 3), "generation time, s"),
    ]
    out = Path(out_dir)
    prov = provenance(cfg, stage="sky")
    paths = {"sky": skymap.write_map(out / "sky.fits", m, extra_header=header, provenance=prov,
                                     column_names=["TEMPERATURE"], column_units="uK")}
    if cfg.sky.mask == "demo":
        mask = mask_for_seed(recipe.nside, recipe.seed, cfg.sky.mask_band_deg, cfg.sky.mask_holes,
                             cfg.sky.mask_hole_deg)
        mhead = [("MASKKIND", "demo", "galactic-like band plus round holes; 1 = valid"),
                 ("BAND_DEG", cfg.sky.mask_band_deg, "band half-width at lon 180, deg"),
                 ("NHOLES", cfg.sky.mask_holes, "round holes"),
                 ("HOLE_DEG", cfg.sky.mask_hole_deg, "hole radius, deg"),
                 ("SEED", recipe.seed, "numpy SeedSequence seed (third stream)"),
                 ("FSKY", float(np.mean(mask)), "valid fraction")]
        paths["mask"] = skymap.write_map(out / "mask.fits", mask, extra_header=mhead, provenance=provenance(
            cfg, stage="sky-mask"), column_names=["MASK"], column_units="")
    return paths


# --------------------------------------------------------------------------- command-line handlers
def cmd_predict(args):
    from ..config import load_config
    from ..rundir import open_run
    from ..results import read_table
    from ..rings import format_twist

    cfg = load_config(args.config)
    run = open_run(cfg, args.out, args.force, "predict")
    path = run_predict(cfg, run.dir)
    t = read_table(path, "predicted circles")
    lines = [f"{cfg.topology.space} {list(cfg.topology.lengths)} ({cfg.topology.units}) seen from "
             f"{list(cfg.topology.observer)}: {len(t)} circle pairs"]
    for r in t[:12]:
        lines.append(f"  radius {r['radius_deg']:6.2f} deg, separation {r['separation_deg']:6.2f} deg, "
                     f"twist {format_twist(r['twist_deg']):>6} deg, flip {bool(r['flip'])}  [{r['element']}]")
    if len(t) > 12:
        lines.append(f"  ... {len(t) - 12} more in {path.name}")
    run.finish(lines)
    return 0


def cmd_sky(args):
    from ..config import load_config
    from ..rundir import open_run

    cfg = load_config(args.config)
    run = open_run(cfg, args.out, args.force, "sky")
    paths = run_sky(cfg, run.dir)
    pred = run_predict(cfg, run.dir)
    run.finish([f"{cfg.topology.space} sky ({cfg.sky.physics}, nside {cfg.sky.nside}, seed {cfg.sky.seed}) -> "
                + ", ".join(p.name for p in paths.values()) + f"; predicted circles -> {pred.name}"])
    return 0
