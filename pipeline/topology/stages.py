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
from .skies import SkyParamError, SkyRecipe, check_sky, make_sky, mask_for_seed, mode_cut


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
        check_sky(space, recipe, memory_gb=cfg.compute.memory_gb, cosmo=cfg.cosmology)
    except SkyParamError as exc:
        section = "topology" if exc.key == "angles_deg" else "sky"
        found = exc.found if exc.found is not None else getattr(cfg.sky, exc.key, None)
        raise InputError(f"{cfg.source}: {section}.{exc.key}: found {_fmt(found)}; allowed: {exc.allowed}")
    return space, recipe


def _spherical_meta(cfg, space):
    from ..cosmology import chi_ls_gpc, curvature_radius_gpc

    return {"observer": list(cfg.topology.observer), "euler_deg": list(cfg.topology.euler_deg),
            "omega_k": cfg.cosmology.omega_k, "chi_ls_gpc": chi_ls_gpc(cfg.cosmology),
            "curvature_radius_gpc": curvature_radius_gpc(cfg.cosmology),
            "chi_over_r_source": "astropy LambdaCDM background (twinring.cosmology.chi_over_r)"}


def run_predict(cfg, out_dir) -> Path:
    """Write ``circles.ecsv`` (+ ``circles.fits``) for the configured space and observer."""
    from . import spherical

    if spherical.is_spherical_name(cfg.topology.space):
        space = spherical.spherical_from_config(cfg.topology, cfg.cosmology, cfg.source)
        table = spherical.predict_circles(space)
        table.meta.update(_spherical_meta(cfg, space))
    else:
        space = space_from_config(cfg.topology, cfg.cosmology, cfg.source)
        table = predict_circles(space)
        table.meta.update(_topology_meta(cfg, space))
    path = Path(out_dir) / "circles.ecsv"
    write_table(table, path, meta=provenance(cfg, stage="predict"))
    return path


def _write_sky(cfg, out_dir, m, basics, specific, elapsed) -> dict:
    """Write ``sky.fits`` with the space's own header cards ``specific`` followed by the ones every sky
    carries (``basics``: the sky recipe's seed, band limits, beam, noise and nside), and, with
    ``sky.mask: demo``, ``mask.fits``; return their paths."""
    from .. import skymap
    from ..cosmology import chi_ls_gpc, t0_uk

    header = list(specific) + [
        ("SEED", basics.seed, "numpy SeedSequence seed"),
        ("LMAX", basics.lmax, "band limit of the map"),
        ("LMIN", basics.lmin, "multipoles below are zero"),
        ("FWHM_DEG", basics.fwhm_deg, "Gaussian beam FWHM, deg"),
        ("NOISE", basics.noise_uk_arcmin, "white noise, uK-arcmin"),
        ("CHI_GPC", round(chi_ls_gpc(cfg.cosmology), 6), "distance to last scattering, Gpc"),
        ("TCMB_UK", t0_uk(cfg.cosmology), "CMB temperature, uK"),
        ("SKYSECS", round(elapsed, 3), "generation time, s"),
    ]
    out = Path(out_dir)
    paths = {"sky": skymap.write_map(out / "sky.fits", m, extra_header=header, provenance=provenance(cfg, stage="sky"),
                                     column_names=["TEMPERATURE"], column_units="uK")}
    s = cfg.sky
    if s.mask == "demo":
        mask = mask_for_seed(basics.nside, basics.seed, s.mask_band_deg, s.mask_holes, s.mask_hole_deg)
        mhead = [("MASKKIND", "demo", "galactic-like band plus round holes; 1 = valid"),
                 ("BAND_DEG", s.mask_band_deg, "band half-width at lon 180, deg"),
                 ("NHOLES", s.mask_holes, "round holes"),
                 ("HOLE_DEG", s.mask_hole_deg, "hole radius, deg"),
                 ("SEED", basics.seed, "numpy SeedSequence seed (third stream)"),
                 ("FSKY", float(np.mean(mask)), "valid fraction")]
        paths["mask"] = skymap.write_map(out / "mask.fits", mask, extra_header=mhead, provenance=provenance(
            cfg, stage="sky-mask"), column_names=["MASK"], column_units="")
    return paths


def run_sky(cfg, out_dir) -> dict:
    """Write ``sky.fits`` (uK, RING) and, with ``sky.mask: demo``, ``mask.fits``; return their paths."""
    from . import spherical

    if spherical.is_spherical_name(cfg.topology.space):
        return _run_sky_spherical(cfg, out_dir)
    space, recipe = checked_sky_inputs(cfg)
    t_start = time.perf_counter()
    m = make_sky(space, nside=recipe.nside, lmax=recipe.lmax, fwhm_deg=recipe.fwhm_deg, physics=recipe.physics,
                 seed=recipe.seed, noise_uk_arcmin=recipe.noise_uk_arcmin, lmin=recipe.lmin,
                 kmax_factor=recipe.kmax_factor, open_length=recipe.open_length, cosmo=cfg.cosmology,
                 nthreads=cfg.compute.threads)
    elapsed = time.perf_counter() - t_start
    cut = mode_cut(recipe, cfg.cosmology)
    t = cfg.topology
    return _write_sky(cfg, out_dir, m, recipe, [
        ("SPACE", space.name, "flat space (Riazuelo et al. 2004 numbering)"),
        ("LENGTHS", json.dumps(list(t.lengths)), f"generator lengths, units {t.units}"),
        ("LUNITS", t.units, "units of LENGTHS and OBSERVER"),
        ("ANGLES", json.dumps(None if t.angles_deg is None else list(t.angles_deg)), "lattice/twist angles, deg"),
        ("OBSERVER", json.dumps(list(t.observer)), "observer, domain frame"),
        ("EULER", json.dumps(list(t.euler_deg)), "domain rotation z-y-z, deg"),
        ("PHYSICS", recipe.physics, "sw: Sachs-Wolfe thin shell; full: CAMB transfer"),
        ("KMAXFAC", round(cut.factor, 4), "modes kept to |k| chi = KMAXFAC * LMAX"),
        ("KMAXAUTO", cut.automatic, "KMAXFAC chosen by convergence of the C_l integral"),
        ("TAILMAX", round(cut.worst_omitted, 4), "largest C_l fraction beyond the cut, put back"),
        ("OPENLEN", recipe.open_length, "stand-in period of open directions, chi"),
        ("HOLONOM", space.holonomy_order(), "holonomy group order"),
    ], elapsed)


def _run_sky_spherical(cfg, out_dir) -> dict:
    """Sachs-Wolfe sky of a spherical space (twinring.topology.skies_spherical)."""
    from ..cosmology import curvature_radius_gpc
    from . import skies_spherical, spherical

    space = spherical.spherical_from_config(cfg.topology, cfg.cosmology, cfg.source)
    s = cfg.sky
    if s.physics != "sw":
        raise InputError(f"{cfg.source}: sky.physics: found {s.physics!r}; allowed: sw for the spherical space "
                         f"{space.name}")
    t_start = time.perf_counter()
    try:
        m, info = skies_spherical.make_sky(space, nside=s.nside, lmax=s.lmax, fwhm_deg=s.fwhm_deg, seed=s.seed,
                                           noise_uk_arcmin=s.noise_uk_arcmin, lmin=s.lmin, kmax_factor=1.0,
                                           cosmo=cfg.cosmology, nthreads=max(1, cfg.compute.threads),
                                           return_info=True)
    except ValueError as exc:
        raise InputError(f"{cfg.source}: sky.lmax: found {s.lmax}; allowed: a band limit this group can reach ({exc})")
    elapsed = time.perf_counter() - t_start
    return _write_sky(cfg, out_dir, m, s, [
        ("SPACE", space.name, "spherical space S3/Gamma"),
        ("GORDER", space.order, "group order"),
        ("OMEGA_K", cfg.cosmology.omega_k, "curvature density"),
        ("CHI_R", round(space.chi_over_r, 9), "last-scattering radius / curvature radius"),
        ("R_GPC", round(curvature_radius_gpc(cfg.cosmology), 6), "curvature radius, Gpc"),
        ("OBSERVER", json.dumps([round(float(x), 9) for x in space.observer]), "observer quaternion w,x,y,z"),
        ("EULER", json.dumps(list(cfg.topology.euler_deg)), "sky rotation z-y-z, deg"),
        ("PHYSICS", "sw", "Sachs-Wolfe, invariant S3 modes n = 3..NMAX"),
        ("NMAX", info["n_max"], "highest S3 eigenspace n (eigenvalue n^2 - 1)"),
        ("NMODES", info["invariant_modes"], "invariant modes used"),
    ], elapsed)


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
    if t.meta.get("geometry") == "spherical":
        lines = [f"{cfg.topology.space} (order {t.meta['group_order']}, omega_k {cfg.cosmology.omega_k}, "
                 f"chi/R {t.meta['chi_over_r']:.4f}) seen from {list(cfg.topology.observer)}: {len(t)} circle pairs"]
    else:
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
