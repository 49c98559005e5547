"""twinring from Python: the stages as functions on arrays and tables.

Every function here is a thin, documented door into the stage modules; the
science stays in them (``prepare``, ``rings``, ``statistic``, ``search``,
``topology``).  Options are the config keys of the matching section (see
``twinring config``), validated exactly as in a YAML run config: a bad value
raises :class:`twinring.config.InputError` naming the key.

Conventions: temperatures in µK, angles in degrees, HEALPix RING order,
``lon = phi``, ``lat = 90 - theta`` in the map's frame.  Circle phases, twist
and sense follow :mod:`twinring.rings`.

>>> import twinring
>>> sky = twinring.make_sky("E1", [1.2, 1.2, 1.2], nside=32, lmax=48)     # doctest: +SKIP
>>> prepared = twinring.prepare_map(sky, nside=32, lmax=48, fwhm_deg=4.0)  # doctest: +SKIP
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from .config import InputError

__all__ = ["read_map", "prepare_map", "sample_rings", "pair_s", "search_map", "predict_circles", "make_sky",
           "read_run", "candidate_profiles"]

_SOURCE = "twinring"


def _section(name, options):
    from .config import SECTIONS, build_section

    return build_section(SECTIONS[name], dict(options), _SOURCE, name, None)


def _as_sky(sky, mask=None):
    """A :class:`~twinring.skymap.SkyMap` from a SkyMap or a RING array in µK."""
    import healpy as hp

    from .skymap import SkyMap

    if isinstance(sky, SkyMap):
        return sky
    values = np.asarray(sky, dtype=float)
    if values.ndim != 1 or not hp.isnpixok(values.size):
        raise InputError(f"{_SOURCE}: map: found an array of shape {values.shape}; allowed: a HEALPix RING map "
                         "(12 nside^2 values)")
    if mask is None:
        m = np.isfinite(values).astype(float)
    else:
        m = np.asarray(mask, dtype=float)
        if m.shape != values.shape:
            raise InputError(f"{_SOURCE}: mask: found shape {m.shape}; allowed: the map's shape {values.shape}")
        m = ((m > 0.5) & np.isfinite(values)).astype(float)
    return SkyMap(values=np.where(m > 0, values, 0.0), mask=m, nside=hp.npix2nside(values.size), unit_in="uK",
                  frame=None, checksum="")


def read_map(path, field=0, mask=None, mask_field=0, mask_threshold=0.5):
    """Read a HEALPix FITS temperature map and optional mask.

    Parameters
    ----------
    path : str or Path
        HEALPix FITS map; its unit (TUNIT: K, mK, µK, K_CMB ...) is converted to µK.
    field : int
        Column of the map to read (0 = first).
    mask : str or Path, optional
        HEALPix FITS mask (1 = use, 0 = masked).
    mask_field : int
        Column of the mask.
    mask_threshold : float
        Mask values at or above this count as usable.

    Returns
    -------
    twinring.skymap.SkyMap
        ``values`` [µK, RING], ``mask`` (0/1), ``nside``, ``frame`` (G, C, E or None).
    """
    from .skymap import load_map

    return load_map(path, field=field, mask_path=mask, mask_field=mask_field, mask_threshold=mask_threshold)


def prepare_map(sky, mask=None, **prepare):
    """Remove monopole and dipole, band-limit and smooth a map, as the ``prepare`` stage does.

    Parameters
    ----------
    sky : SkyMap or ndarray
        A map from :func:`read_map` or :func:`make_sky`, or a HEALPix RING array [µK]
        (non-finite pixels count as masked).
    mask : ndarray, optional
        0/1 RING mask for an array ``sky`` (1 = use).
    **prepare
        Keys of the ``prepare`` section: ``nside``, ``fwhm_deg`` [deg], ``input_fwhm_deg`` [deg],
        ``lmax``, ``lmin``, ``remove_dipole``, ``iterations``.

    Returns
    -------
    twinring.prepare.Prepared
        ``alm`` (healpy order, µK), ``lmax``, ``nside``, ``map`` [µK], ``mask`` (0/1), ``fwhm_deg`` [deg].
    """
    from .prepare import prepare_map as _prepare

    return _prepare(_as_sky(sky, mask), _section("prepare", prepare))


def sample_rings(prepared, lon_deg, lat_deg, radius_deg, other_lon_deg=None, other_lat_deg=None, nsamp=None):
    """Temperatures along circles, at equally spaced phases, from the prepared a_lm.

    Parameters
    ----------
    prepared : Prepared
        From :func:`prepare_map`.
    lon_deg, lat_deg : float or array_like
        Circle centres [deg].
    radius_deg : float
        Angular radius of every circle [deg].
    other_lon_deg, other_lat_deg : float or array_like, optional
        Centre of each circle's partner: sets the phase origin (towards the partner;
        towards north for back-to-back pairs or when not given), as in :mod:`twinring.rings`.
    nsamp : int, optional
        Samples per circle (default: the search's, about 2 (lmax sin(radius) + 8)).

    Returns
    -------
    values : ndarray, shape (n, nsamp)
        Ring temperatures [µK] at phases ``360 k / nsamp`` degrees.
    valid : ndarray of bool, shape (n, nsamp)
        True where the sample falls on an unmasked pixel.
    """
    from . import rings

    alpha = math.radians(float(radius_deg))
    c = rings.lonlat_to_vec(np.atleast_1d(np.asarray(lon_deg, float)), np.atleast_1d(np.asarray(lat_deg, float)))
    other = None
    if other_lon_deg is not None:
        other = rings.lonlat_to_vec(np.atleast_1d(np.asarray(other_lon_deg, float)),
                                    np.atleast_1d(np.asarray(other_lat_deg, float)))
    n = int(nsamp) if nsamp else rings.samples_for(alpha, prepared.lmax)
    vals, w = rings.sample_rings(prepared.alm, prepared.lmax, c, alpha, n, other=other, mask=prepared.mask)
    valid = np.ones(vals.shape, bool) if w is None else w > 0.5
    return vals, valid


def pair_s(prepared, lon1_deg, lat1_deg, lon2_deg, lat2_deg, radius_deg, weighting="m", oversample=8):
    """S of one circle pair for every twist, both senses.

    Parameters
    ----------
    prepared : Prepared
        From :func:`prepare_map`.
    lon1_deg, lat1_deg, lon2_deg, lat2_deg : float
        Centres of circle 1 and circle 2 [deg].
    radius_deg : float
        Radius of both circles [deg].
    weighting : {"m", "flat"}
        |m|-weighted S (Cornish, Spergel, Starkman & Komatsu 2004) or the unweighted one (CSS 1998).
    oversample : int
        Twists evaluated per ring sample (unmasked rings only).

    Returns
    -------
    dict
        ``twist_deg`` (M,) twists [deg, 0 to 360); ``s_flip_false``, ``s_flip_true`` (M,) S at each
        twist for circle 2 in the same or the opposite sense; ``best``: ``{"s", "twist_deg", "flip"}``
        of the largest S.
    """
    from .rings import wrap_twist_deg

    row = dict(lon1_deg=lon1_deg, lat1_deg=lat1_deg, lon2_deg=lon2_deg, lat2_deg=lat2_deg, radius_deg=radius_deg,
               twist_deg=0.0, flip=False)
    d = candidate_profiles(prepared, row, weighting=weighting, oversample=oversample)
    tw = d["twist_grid_deg"]
    s0, s1 = d["s_curve"][False], d["s_curve"][True]
    k0, k1 = int(np.argmax(s0)), int(np.argmax(s1))
    best = (dict(s=float(s1[k1]), twist_deg=wrap_twist_deg(tw[k1]), flip=True) if s1[k1] > s0[k0]
            else dict(s=float(s0[k0]), twist_deg=wrap_twist_deg(tw[k0]), flip=False))
    return dict(twist_deg=tw, s_flip_false=s0, s_flip_true=s1, best=best)


def search_map(prepared, listed=None, compute=None, progress=None, **search):
    """The matched-circle search of a prepared map, as ``twinring search`` runs it.

    Parameters
    ----------
    prepared : Prepared
        From :func:`prepare_map`.
    listed : astropy.table.Table, optional
        Pairs to scan for ``family="listed"`` (columns lon1_deg, lat1_deg, lon2_deg, lat2_deg [deg]).
    compute : dict, optional
        Keys of the ``compute`` section (backend, workers, memory_gb, threads); default serial.
    progress : callable, optional
        ``progress(iterable, desc=, unit=, total=)``, e.g. ``tqdm.tqdm``.
    **search
        Keys of the ``search`` section: ``family``, ``nside_centers``, ``radius_deg`` ([min, max, step],
        deg), ``separation_deg`` [deg], ``weighting``, ``top``, ``refine``, ``method`` ...

    Returns
    -------
    candidates : astropy.table.Table
        The best pairs (rank, radius_deg, lon/lat of both centres, separation_deg, twist_deg [deg],
        flip, s, s_grid), as in candidates.ecsv.
    peaks : astropy.table.Table
        The largest grid S per radius and sense, as in peaks.ecsv.
    """
    from . import search as search_mod

    if "listed" in search:
        raise InputError(f"{_SOURCE}: search.listed: a path is for config files; allowed: pass the table as listed=")
    raw = dict(search)
    if listed is not None:
        raw.setdefault("family", "listed")
        raw["listed"] = "<table>"
    scfg = _section("search", raw)
    ccfg = _section("compute", compute or {})
    _, _, cand, peaks = search_mod.run_search(prepared, scfg, ccfg, listed, progress=progress)
    return cand, peaks


def _space(space, lengths, angles_deg=None, observer=(0.0, 0.0, 0.0), euler_deg=(0.0, 0.0, 0.0), units="chi"):
    from .topology.manifolds import space_from_config

    topo = _section("topology", dict(space=space, lengths=list(lengths),
                                     angles_deg=None if angles_deg is None else list(angles_deg),
                                     observer=list(observer), euler_deg=list(euler_deg), units=units))
    return space_from_config(topo, None, _SOURCE)


def predict_circles(space, lengths, angles_deg=None, observer=(0.0, 0.0, 0.0), euler_deg=(0.0, 0.0, 0.0),
                    units="chi"):
    """The circle pairs a flat space must show (Cornish, Spergel & Starkman 1998).

    Parameters
    ----------
    space : str
        ``"E1"`` ... ``"E18"``.
    lengths : sequence of float
        Translation lengths of the generators [chi, or Gpc with ``units="Gpc"``].
    angles_deg : sequence of float, optional
        Lattice angles (E1) or the slab twist (E16) [deg].
    observer : sequence of 3 float
        Observer in the domain's frame [chi or Gpc].
    euler_deg : sequence of 3 float
        z-y-z Euler angles turning the domain on the sky [deg].
    units : {"chi", "Gpc"}

    Returns
    -------
    astropy.table.Table
        One row per pair: radius_deg, lon1_deg, lat1_deg, lon2_deg, lat2_deg, separation_deg,
        twist_deg [deg, 0 to 360), flip, element, distance [chi].
    """
    from .topology.circles import predict_circles as _predict

    return _predict(_space(space, lengths, angles_deg, observer, euler_deg, units))


def make_sky(space, lengths, angles_deg=None, observer=(0.0, 0.0, 0.0), euler_deg=(0.0, 0.0, 0.0), units="chi",
             return_alm=False, **sky):
    """A Gaussian sky of a flat space (Sachs–Wolfe or full CAMB physics), HEALPix RING in µK.

    Parameters
    ----------
    space, lengths, angles_deg, observer, euler_deg, units
        As in :func:`predict_circles`.
    return_alm : bool
        Also return the sky's a_lm (healpy order, beam applied, µK).
    **sky
        Keys of the ``sky`` section: ``nside``, ``lmax``, ``lmin``, ``fwhm_deg`` [deg], ``physics``
        (``"sw"`` or ``"full"``), ``seed``, ``noise_uk_arcmin`` [µK arcmin], ``kmax_factor``,
        ``open_length_chi``.  (``mask`` keys are for run configs; pass a mask to :func:`prepare_map`.)

    Returns
    -------
    ndarray or (ndarray, ndarray)
        The map [µK, RING] (and its a_lm).
    """
    from .topology.skies import make_sky as _make

    s = _section("sky", sky)
    return _make(_space(space, lengths, angles_deg, observer, euler_deg, units), nside=s.nside, lmax=s.lmax,
                 fwhm_deg=s.fwhm_deg, physics=s.physics, seed=s.seed, noise_uk_arcmin=s.noise_uk_arcmin,
                 lmin=s.lmin, kmax_factor=s.kmax_factor, open_length=s.open_length_chi, nthreads=1,
                 return_alm=return_alm)


RUN_TABLES = ("candidates", "peaks", "thresholds", "null_peaks", "circles", "injections", "recovery", "bound")


def read_run(run_dir):
    """The tables of a run directory.

    Parameters
    ----------
    run_dir : str or Path
        A directory written by ``twinring run`` or the stage commands.

    Returns
    -------
    dict
        ``{name: astropy.table.Table}`` for each of candidates, peaks, thresholds, null_peaks,
        circles, injections, recovery, bound present (ECSV, metadata in ``table.meta``), and
        ``"config"``: the run's resolved :class:`~twinring.config.RunConfig` (or None).
        Column meanings and units: README, "Output columns".
    """
    from .report import run_config
    from .results import read_table

    d = Path(run_dir).expanduser()
    if not d.is_dir():
        raise InputError(f"{d}: run directory not found; allowed: a directory written by twinring")
    out = {name: read_table(d / f"{name}.ecsv", f"{name} table") for name in RUN_TABLES
           if (d / f"{name}.ecsv").exists()}
    out["config"] = run_config(d)
    return out


def candidate_profiles(prepared, row, weighting="m", oversample=8):
    """A candidate's two ring profiles at its twist and sense, and S against twist for both senses.

    Parameters
    ----------
    prepared : Prepared
        From :func:`prepare_map`.
    row : mapping or table row
        ``lon1_deg, lat1_deg, lon2_deg, lat2_deg, radius_deg, twist_deg`` [deg] and ``flip``,
        e.g. a row of candidates.ecsv.
    weighting : {"m", "flat"}
        The search's weighting.

    Returns
    -------
    dict
        See :func:`twinring.report.candidate_profiles`: ``phi_deg``, profiles ``t1``, ``t2`` [µK,
        filtered as S compares them], ``s_profiles``, ``twist_grid_deg``, ``s_curve``.
    """
    from . import report

    return report.candidate_profiles(prepared.alm, prepared.lmax, prepared.mask, row, weighting, oversample)
