"""The config reference: every key of every section, from the validator's own field definitions.

``twinring config`` prints, for every section of :data:`twinring.config.SECTIONS`
and every field of its dataclass, the key, its default, its type and allowed
values (from the field's ``metadata``: ``kind``, ``min``/``max``/``open_min``,
``choices``, ``length``, ``pow2``, the rules ``load_config`` enforces) and one
line of help.  ``twinring config --defaults`` writes a complete YAML config of
every default with the same information as comments; it loads back through
:func:`twinring.config.load_config` unchanged.

Help lines come from the field's ``metadata['help']`` when a field carries one
(``_f(default, kind, ..., help="...")``), else from :data:`HELP` below.  A field
without help is listed with ``(no help yet)``; the test suite refuses that.
"""
from __future__ import annotations

import dataclasses
import json

from .config import SECTIONS

MISSING_HELP = "(no help yet)"

# one line per key: what it does, with units
HELP = {
    "map": {
        "allow_polarisation": "accept a Q/U/E/B column as the map (refused as temperature unless true)",
        "path": "HEALPix FITS map to search (temperature; unit read from TUNIT); null for a synthetic sky",
        "paths": "several maps (list or glob) each prepared, searched and calibrated alike, in maps/<name>/, "
                 "compared in consistency.ecsv; null = map.path",
        "field": "column (field) of the map file to read, 0 = the first",
        "mask": "HEALPix FITS mask, 1 = use and 0 = masked; null = no mask",
        "mask_field": "column (field) of the mask file to read",
        "mask_threshold": "mask values >= this count as usable pixels",
    },
    "prepare": {
        "input_beam": "the input map's beam as a B_l table (FITS or text), instead of input_fwhm_deg",
        "input_pixwin": "divide the input map's HEALPix pixel window out of its a_lm (true for survey maps)",
        "mask_widen_fwhm": "widen the mask by this many prepare.fwhm_deg before the search; 0 = not widened",
        "filter": "none; optimal (ring modes weighted per radius by the power both views share, from CAMB's "
                  "source split, the beam, the search grid and calibrate.noise_uk_arcmin; replaces search.weighting); or multipole "
                  "(one per-l filter for all radii; measured not to help, README)",
        "nside": "HEALPix Nside of the prepared map",
        "fwhm_deg": "FWHM of the Gaussian beam of the prepared map [deg]",
        "input_fwhm_deg": "FWHM of the beam the input map already has [deg]; the prepared beam replaces it",
        "lmax": "highest multipole kept in the prepared map",
        "lmin": "lowest multipole kept (2 removes monopole and dipole)",
        "remove_dipole": "fit and remove monopole and dipole over the usable pixels before the transform",
        "iterations": "Jacobi iterations of the map-to-a_lm transform (healpy map2alm iter)",
    },
    "search": {
        "family": "circle pairs searched: antipodal (back to back), general (any separation) or listed (a table)",
        "method": "exhaustive (exact S for every pair) or fast (twist-invariant screen, exact S on survivors)",
        "nside_centers": "HEALPix Nside of the grid of circle centres",
        "radius_deg": "circle radii searched: [min, max, step] [deg]",
        "separation_deg": "centre separations of general pairs: [min, max] [deg]",
        "weighting": "S statistic weighting of ring Fourier modes: m (|m|-weighted) or flat",
        "top": "number of candidates written to candidates.ecsv",
        "listed": "table of circle-centre pairs (lon1_deg, lat1_deg, lon2_deg, lat2_deg) for family listed",
        "min_valid_fraction": "fewest samples valid on both circles, as a fraction of the ring, for a pair to count",
        "sample_margin": "extra Fourier modes per ring beyond lmax sin(radius) when choosing the ring length",
        "refine": "refine candidates off the grid (centres, radius, twist) by local maximisation of S",
        "suppress_deg": "centre distance within which weaker candidates are merged [deg]; 0 = 2.5 grid steps",
        "keep_per_radius": "best pairs kept per radius and chunk before merging",
        "screen_partners": "fast method: best partners kept per centre and radius by the screen; null = 16 at "
                           "nside_centers >= 64, else 64",
        "screen_mmax": "fast method: highest Fourier mode of the screen; 0 = from the ring power",
        "screen_levels": "fast method: score all pairs on the grid this many HEALPix levels coarser, then only "
                         "the fine centres near kept coarse pairs; 0 = all pairs of the grid; null = 1 at "
                         "nside_centers >= 64, else 0",
    },
    "output": {
        "dir": "run directory for every output (relative to the working directory)",
    },
    "compute": {
        "backend": "where work units run: serial, processes (local joblib pool) or dask",
        "workers": "worker processes (processes, dask)",
        "scheduler": "address of a running Dask scheduler; null = start a local cluster",
        "memory_gb": "memory budget that caps the work units in flight [GB]",
        "threads": "threads per process for ring synthesis and FFTs; 0 = 1",
        "progress": "show live progress bars on a terminal",
    },
    "topology": {
        "space": "flat space E1-E18 (numbering of Riazuelo et al. 2004)",
        "lengths": "translation lengths of the generators (in units)",
        "angles_deg": "lattice angles (E1) or slab twist (E16) [deg]; null = the space's default",
        "units": "unit of lengths and observer: chi (distance to last scattering) or Gpc",
        "observer": "observer position in the domain's frame (in units)",
        "euler_deg": "z-y-z Euler angles turning the domain on the sky [deg]",
    },
    "sky": {
        "nside": "HEALPix Nside of the synthetic sky",
        "lmax": "highest multipole of the synthetic sky",
        "lmin": "lowest multipole of the synthetic sky",
        "fwhm_deg": "FWHM of the Gaussian beam of the synthetic sky [deg]",
        "physics": "temperature physics: sw (Sachs-Wolfe only) or full (CAMB transfer functions)",
        "seed": "seed of the sky's random numbers (numpy SeedSequence)",
        "noise_uk_arcmin": "white-noise level added to the sky [uK arcmin]",
        "mask": "mask of the synthetic survey: none or demo (a band and round holes)",
        "mask_band_deg": "half-width of the demo mask's band [deg]",
        "mask_holes": "number of round holes in the demo mask",
        "mask_hole_deg": "radius of each hole of the demo mask [deg]",
        "kmax_factor": "highest wavenumber of the modes, as a multiple of lmax / chi",
        "open_length_chi": "stand-in period of open directions (E11-E18) [chi]",
    },
    "cosmology": {
        "h0": "Hubble constant [km/s/Mpc]",
        "ombh2": "physical baryon density Omega_b h^2",
        "omch2": "physical cold dark matter density Omega_c h^2",
        "mnu": "sum of neutrino masses [eV]",
        "neff": "effective number of neutrino species",
        "tcmb": "CMB temperature today [K]",
        "tau": "optical depth to reionisation",
        "a_s": "amplitude of primordial scalar fluctuations at the pivot",
        "n_s": "scalar spectral index",
        "pivot_mpc": "pivot wavenumber of a_s and n_s [1/Mpc]",
        "z_ls": "redshift of last scattering (sets chi)",
        "omega_k": "curvature density Omega_k; negative: spherical space (sets R = c / (H0 sqrt|Omega_k|))",
    },
    "calibrate": {
        "maps": "supplied simulation maps (glob or list, relative to the config); N = their count",
        "noise_maps": "noise maps added one per Gaussian simulation (glob or list)",
        "noise_variance_map": "per-pixel noise variance [uK^2], or hit counts with noise_per_hit_uk",
        "noise_variance_field": "column of noise_variance_map to read",
        "noise_per_hit_uk": "noise of one hit [uK] when noise_variance_map holds hit counts",
        "coupling": "data spectrum: master (mask mode coupling corrected) or fsky (1/f_sky rescaling)",
        "simulations": "number N of isotropic Gaussian simulations (p-values are floored at 1/(N+1))",
        "spectrum": "power spectrum of the simulations: data (measured), theory (CAMB) or file",
        "spectrum_file": "table of l and C_l [uK^2] for spectrum file",
        "false_alarm": "false-alarm rates whose thresholds are tabulated (usable only when N >= 1/rate - 1)",
        "significance": "global false-alarm rate at which a candidate is called significant (needs N >= 1/rate - 1)",
        "seed": "seed of the simulations (numpy SeedSequence, one child per simulation)",
        "noise_uk_arcmin": "white-noise level added to each simulation [uK arcmin]",
        "tail": "extreme-value law fitted to the simulations' maxima (descriptive only): gumbel or genextreme",
        "sim_nside": "HEALPix Nside of the simulated maps; 0 = the input map's",
    },
    "inject": {
        "sizes": "sizes of space injected [chi]; empty = derived from radii_deg",
        "radii_deg": "largest circle radii injected, when sizes is empty [deg]",
        "realizations": "injected skies per size",
        "seed": "seed of the injected skies (numpy SeedSequence)",
        "mode": "detection: targeted (grid pairs near the predicted ones) or full (the whole search)",
        "false_alarm": "false-alarm rate of the threshold a recovered pair must reach; null = calibrate.significance",
        "threshold": "threshold used: global (look-elsewhere corrected) or local",
        "radius_tol_deg": "radius tolerance when matching recovered to predicted pairs [deg]",
        "centre_tol_deg": "centre tolerance when matching recovered to predicted pairs [deg]; 0 = 2.5 grid steps",
        "noise_uk_arcmin": "white noise of the injected skies [uK arcmin]; null = from the sky section or 0",
        "beam_fwhm_deg": "instrument beam of the injected skies [deg]; null = from the sky section or 0",
        "random_orientation": "turn the space by a random rotation in each injected sky",
        "physics": "temperature physics of the injected skies: full (CAMB: SW, ISW, Doppler) or sw (labelled idealised)",
    },
    "bound": {
        "recovery": "recovered fraction an injected radius must reach to be detectable",
        "false_alarm": "p_global at or below which a candidate voids the bound; null = calibrate.significance",
        "chi_gpc": "distance to last scattering [Gpc]; null = from the cosmology section",
        "point_fraction": "judge recovery by the point fraction instead of its one-sided 95 % lower limit (labelled)",
    },
    "exclude": {
        "spaces": "flat spaces to sample (E1-E17); empty = topology.space",
        "points": "ECSV table of parameter points (lengths, angles, observer in chi) instead of sampling",
        "sampling": "how points are sampled: sobol, halton or grid",
        "samples": "number of sampled points per space",
        "seed": "seed of the sampling (scrambled sequences)",
        "length_range_chi": "[min, max] of the sampled lengths [chi]",
        "angle_range_deg": "[min, max] of the sampled free angles [deg]",
        "twists_deg": "twists sampled for the slab space E16 [deg]",
        "open_range_chi": "observer range along open directions of chimney and slab spaces [chi]",
        "alpha_min_deg": "smallest detectable circle radius [deg]; null = the run's bound.ecsv",
        "coverage": "pairs the search sees: general (all), antipodal (back-to-back) or run (its own family)",
        "antipodal_tol_deg": "how far from back-to-back an antipodal search still sees a pair [deg]",
    },
    "report": {
        "circles": "top candidates drawn on the map and given a candidate figure",
        "dpi": "resolution of the figures [dots per inch]",
    },
    "consistency": {
        "top": "top candidates of each map matched across the maps (map.paths); null = report.circles",
        "centre_tol_deg": "largest angle between matched centres, in either order [deg]; null = centre_steps "
                          "centre-grid steps",
        "centre_steps": "centre tolerance in centre-grid steps (HEALPix resolution of search.nside_centers)",
        "radius_tol_deg": "largest radius difference of matched pairs [deg]; null = the search's radius step",
    },
}

KIND_NAMES = {"int": "integer", "float": "number", "bool": "true | false", "str": "string", "path": "file path",
              "floats": "list of numbers", "any": "any value"}


@dataclasses.dataclass(frozen=True)
class KeyInfo:
    """One config key: ``section.key``, its default, type, allowed values and help."""
    section: str
    key: str
    default: object
    kind: str
    allowed: str
    help: str

    @property
    def name(self):
        return f"{self.section}.{self.key}"


def _yaml_value(v):
    if isinstance(v, tuple):
        return "[" + ", ".join(_yaml_value(x) for x in v) + "]"
    text = json.dumps(v)          # JSON is YAML: null, true, numbers, quoted strings
    if isinstance(v, float) and "e" in text and "." not in text:
        text = text.replace("e", ".0e")   # YAML 1.1 reads 1e-05 as a string
    return text


def _num(x):
    return str(int(x)) if float(x).is_integer() and abs(x) < 1e9 else f"{x:g}"


def allowed_text(meta) -> str:
    """Allowed values of a field, in words, from its validation rules."""
    kind = meta["kind"].rstrip("?")
    optional = meta["kind"].endswith("?")
    if "choices" in meta:
        text = " | ".join(meta["choices"])
    else:
        text = KIND_NAMES.get(kind, kind)
        if kind == "floats" and meta.get("length"):
            text = f"list of {meta['length']} numbers"
        rng = []
        if "min" in meta:
            rng.append((">" if meta.get("open_min") else ">=") + f" {_num(meta['min'])}")
        if "max" in meta:
            rng.append(f"<= {_num(meta['max'])}")
        if rng:
            text += " " + " and ".join(rng)
        if meta.get("pow2"):
            text += ", a power of two"
    if optional:
        text += " | null"
    return text


def keys(sections=None) -> list[KeyInfo]:
    """Every config key, section by section, in dataclass field order."""
    out = []
    for sec, cls in SECTIONS.items():
        if sections and sec not in sections:
            continue
        for f in dataclasses.fields(cls):
            meta = f.metadata
            help_text = meta.get("help") or HELP.get(sec, {}).get(f.name) or MISSING_HELP
            out.append(KeyInfo(sec, f.name, f.default, meta["kind"].rstrip("?"), allowed_text(meta), help_text))
    return out


def reference_text(sections=None) -> str:
    """The listing printed by ``twinring config``."""
    lines = []
    current = None
    rows = keys(sections)
    w_key = max(len(k.key) for k in rows) if rows else 10
    w_def = min(22, max(len(_yaml_value(k.default)) for k in rows)) if rows else 10
    for k in rows:
        if k.section != current:
            current = k.section
            doc = (SECTIONS[current].__doc__ or "").strip().splitlines()[0] if SECTIONS[current].__doc__ else ""
            if doc.startswith(SECTIONS[current].__name__ + "("):   # dataclass's generated signature
                doc = ""
            lines += ["", f"{current}:" + (f"  # {doc}" if doc else "")]
        lines.append(f"  {k.key:<{w_key}}  {_yaml_value(k.default):<{w_def}}  {k.help}  [{k.allowed}]")
    return "\n".join(lines).lstrip("\n") + "\n"


def defaults_yaml(sections=None) -> str:
    """A complete YAML config of every default, each key annotated with its help and allowed values."""
    from . import __version__

    lines = [f"# twinring {__version__}: every config key with its default value.",
             "# Each key: one line of help [allowed values]. Delete what you do not change.", ""]
    current = None
    for k in keys(sections):
        if k.section != current:
            current = k.section
            if len(lines) > 3:
                lines.append("")
            lines.append(f"{current}:")
        lines.append(f"  # {k.help} [{k.allowed}]")
        lines.append(f"  {k.key}: {_yaml_value(k.default)}")
    return "\n".join(lines) + "\n"


def cmd_config(args):
    """``twinring config``: list every key, or write a complete annotated YAML of the defaults."""
    from .config import InputError
    from .results import write_text

    sections = args.section or None
    if sections:
        bad = [s for s in sections if s not in SECTIONS]
        if bad:
            raise InputError(f"--section: found {bad[0]!r}; allowed: {', '.join(SECTIONS)}")
    if args.defaults is None:
        print(reference_text(sections), end="")
        return 0
    text = defaults_yaml(sections)
    if args.defaults == "-":
        print(text, end="")
    else:
        write_text(args.defaults, text)
        print(f"defaults written to {args.defaults}")
    return 0
