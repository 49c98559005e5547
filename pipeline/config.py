"""Run configs: YAML -> validated, frozen config objects with defaults.

Every section is a frozen dataclass.  Each field carries its validation rule in
``metadata`` (``kind`` plus optional ``min``/``max``/``choices``/``length``);
``load_config`` walks the YAML mapping, refuses unknown keys (suggesting the
closest one), checks types and ranges, and runs each section's cross-field
``check``.  Every problem is raised as :class:`InputError` with a one-line
message naming the file, the key path, what was found and what is allowed.

Adding a section: write a dataclass below with ``_f(...)`` fields, add it to
``RunConfig`` and to ``SECTIONS``.
"""
from __future__ import annotations

import dataclasses
import difflib
import hashlib
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from .errors import InputError  # noqa: F401  (re-exported: ``from twinring.config import InputError``)


def _f(default, kind, **rules):
    """A config field: default value, kind name and validation rules."""
    meta = dict(kind=kind, **rules)
    if isinstance(default, (list, dict)):
        raise TypeError("use tuples for sequence defaults")
    return field(default=default, metadata=meta)


def is_pow2(n: int) -> bool:
    return n >= 1 and (n & (n - 1)) == 0


# --------------------------------------------------------------------------- sections
@dataclass(frozen=True)
class MapSection:
    path: str | None = _f(None, "path?")
    # several maps (a list or a glob, relative to the config), each prepared, searched and calibrated alike
    paths: tuple | None = _f(None, "paths?")
    # a 0-based column index or a column name (TTYPE: I_STOKES, TEMPERATURE, ...)
    field: int | str = _f(0, "field")
    mask: str | None = _f(None, "path?")
    mask_field: int = _f(0, "int", min=0)
    mask_threshold: float = _f(0.5, "float", min=0.0, max=1.0, open_min=True)
    # a column whose TTYPE says polarisation (Q_STOKES, U_POLARISATION, ...) is refused unless true
    allow_polarisation: bool = _f(False, "bool")

    def check(self, where):
        if self.path and self.paths:
            raise where("paths", list(self.paths), "null when map.path is given (map.path: one map; map.paths: "
                        "several maps; exactly one of them)")


@dataclass(frozen=True)
class PrepareSection:
    nside: int = _f(64, "int", min=1, pow2=True)
    fwhm_deg: float = _f(3.0, "float", min=0.0)
    input_fwhm_deg: float = _f(0.0, "float", min=0.0)
    lmax: int = _f(128, "int", min=2)
    lmin: int = _f(2, "int", min=0)
    remove_dipole: bool = _f(True, "bool")
    iterations: int = _f(3, "int", min=0, max=10)
    filter: str = _f("none", "str", choices=("none", "multipole", "optimal"))
    # the input map's beam as a B_l table (FITS or text; instead of input_fwhm_deg)
    input_beam: str | None = _f(None, "path?")
    # divide the input map's HEALPix pixel window (healpy.pixwin at its Nside) out of its a_lm
    input_pixwin: bool = _f(False, "bool")
    # widen the mask by this many prepare.fwhm_deg at the prepared Nside before the search (0: not widened)
    mask_widen_fwhm: float = _f(0.0, "float", min=0.0, max=10.0)

    def check(self, where):
        if self.lmax > 3 * self.nside - 1:
            raise where("lmax", self.lmax, f"at most 3*nside-1 = {3 * self.nside - 1} for nside {self.nside}")
        if self.lmin >= self.lmax:
            raise where("lmin", self.lmin, f"below lmax = {self.lmax}")
        if self.input_beam and self.input_fwhm_deg > 0:
            raise where("input_fwhm_deg", self.input_fwhm_deg, "0 when prepare.input_beam (a B_l table) is given")
        if self.input_fwhm_deg > self.fwhm_deg:
            raise where("input_fwhm_deg", self.input_fwhm_deg,
                        f"at most fwhm_deg = {self.fwhm_deg} (the prepared beam; nothing is sharpened)")


@dataclass(frozen=True)
class SearchSection:
    family: str = _f("antipodal", "str", choices=("antipodal", "general", "listed"))
    method: str = _f("exhaustive", "str", choices=("exhaustive", "fast"))
    nside_centers: int = _f(32, "int", min=1, pow2=True)
    radius_deg: tuple = _f((20.0, 80.0, 1.0), "floats", length=3)
    separation_deg: tuple = _f((10.0, 180.0), "floats", length=2)
    weighting: str = _f("m", "str", choices=("m", "flat"))
    top: int = _f(50, "int", min=1, max=100000)
    listed: str | None = _f(None, "path?")
    min_valid_fraction: float = _f(0.5, "float", min=0.0, max=1.0, open_min=True)
    sample_margin: int = _f(8, "int", min=0, max=1000)
    refine: bool = _f(True, "bool")
    suppress_deg: float = _f(0.0, "float", min=0.0, max=90.0)
    keep_per_radius: int = _f(200, "int", min=1, max=1000000)
    screen_partners: int | None = _f(None, "int?", min=1, max=100000)
    screen_mmax: int = _f(0, "int", min=0)
    screen_levels: int | None = _f(None, "int?", min=0, max=4)

    def check(self, where):
        lo, hi, step = self.radius_deg
        if step <= 0:
            raise where("radius_deg", list(self.radius_deg), "a step [min, max, step] with step > 0")
        if not (0 < lo <= hi <= 90):
            raise where("radius_deg", list(self.radius_deg), "0 < min <= max <= 90 degrees")
        slo, shi = self.separation_deg
        if not (0 < slo <= shi <= 180):
            raise where("separation_deg", list(self.separation_deg), "0 < min <= max <= 180 degrees")
        if self.family == "listed" and not self.listed:
            raise where("listed", None, "a table path when family is 'listed'")
        if self.screen_levels and (self.nside_centers >> self.screen_levels) < 1:
            raise where("screen_levels", self.screen_levels, f"at most log2(nside_centers) = "
                        f"{self.nside_centers.bit_length() - 1} (the coarse grid needs Nside >= 1)")

    # defaults of the fast screen when screen_partners / screen_levels are null: from nside_centers
    # FINE_GRID_NSIDE on, one coarse level and K = FINE_GRID_PARTNERS (survival measured there on the
    # reference campaign: twinring.screen.REFERENCE_CAMPAIGN_HIERARCHY), else the single-level screen, K = 64
    FINE_GRID_NSIDE = 64
    FINE_GRID_PARTNERS = 16

    def screen_setup(self):
        """(partners K, coarse levels) of the fast screen: the keys, or their defaults for the grid when null."""
        fine = self.nside_centers >= self.FINE_GRID_NSIDE
        partners = self.screen_partners if self.screen_partners is not None else (
            self.FINE_GRID_PARTNERS if fine else 64)
        levels = self.screen_levels if self.screen_levels is not None else (1 if fine else 0)
        return int(partners), int(levels)

    def radii_deg(self):
        lo, hi, step = self.radius_deg
        n = int(math.floor((hi - lo) / step + 1e-9)) + 1
        return [round(lo + i * step, 10) for i in range(n)]


@dataclass(frozen=True)
class OutputSection:
    dir: str = _f("out", "str")

    def check(self, where):
        pass


@dataclass(frozen=True)
class ComputeSection:
    backend: str = _f("serial", "str", choices=("serial", "processes", "dask"))
    workers: int = _f(1, "int", min=1, max=4096)
    scheduler: str | None = _f(None, "str?")
    memory_gb: float = _f(4.0, "float", min=0.05, max=100000.0)
    threads: int = _f(0, "int", min=0, max=4096)
    progress: bool = _f(True, "bool")

    def check(self, where):
        pass


@dataclass(frozen=True)
class TopologySection:
    """The space: a flat one E1-E18 (see pipeline/topology/manifolds.py for each space's lengths) or a
    spherical one L(p,q), D*4n, T*, O*, I* (pipeline/topology/spherical.py; its size relative to the
    last-scattering sphere comes from ``cosmology.omega_k``, ``lengths`` and ``units`` are not used, and
    ``observer`` is a quaternion [w, x, y, z] or a step [x, y, z] from the identity in curvature radii)."""
    space: str = _f("E1", "str")
    lengths: tuple = _f((1.2, 1.2, 1.2), "floats")
    angles_deg: tuple | None = _f(None, "floats?")
    units: str = _f("chi", "str", choices=("chi", "Gpc"))
    observer: tuple = _f((0.0, 0.0, 0.0), "floats")
    euler_deg: tuple = _f((0.0, 0.0, 0.0), "floats", length=3)

    def check(self, where):
        from .topology.manifolds import SPACE_NAMES, ParamError, check_params
        from .topology import spherical

        if self.space not in SPACE_NAMES:
            try:
                spherical.check_name(self.space)
            except spherical.SphericalParamError:
                raise where("space", self.space, " | ".join(SPACE_NAMES) + " | " + spherical.NAME_TEXT)
            if self.angles_deg is not None:
                raise where("angles_deg", list(self.angles_deg), f"null for the spherical space {self.space}")
            try:
                spherical.observer_quaternion(self.observer)
            except spherical.SphericalParamError as exc:
                raise where(exc.key, exc.found, exc.allowed)
            return
        try:
            check_params(self.space, self.lengths, self.angles_deg, self.observer, self.euler_deg)
        except ParamError as exc:
            raise where(exc.key, exc.found, exc.allowed)


@dataclass(frozen=True)
class SkySection:
    """Synthetic skies of the configured topology (maps in uK, HEALPix RING)."""
    nside: int = _f(64, "int", min=1, max=8192, pow2=True)
    lmax: int = _f(128, "int", min=2)
    lmin: int = _f(2, "int", min=0)
    fwhm_deg: float = _f(3.0, "float", min=0.0, max=180.0)
    physics: str = _f("sw", "str", choices=("sw", "full"))
    seed: int = _f(5, "int", min=0)
    noise_uk_arcmin: float = _f(0.0, "float", min=0.0)
    mask: str = _f("none", "str", choices=("none", "demo"))
    mask_band_deg: float = _f(12.0, "float", min=0.0, max=60.0)
    mask_holes: int = _f(30, "int", min=0, max=100000)
    mask_hole_deg: float = _f(1.5, "float", min=0.0, max=20.0, open_min=True)
    # null (default): automatic mode cut, converged to 15 % per multipole and the rest put back
    # (topology/skies.py mode_cut); a number: modes to |k| chi = kmax_factor * lmax (still corrected)
    kmax_factor: float | None = _f(None, "float?", min=1.0, max=10.0)
    open_length_chi: float = _f(4.0, "float", min=2.0, max=100.0, open_min=True)

    def check(self, where):
        if self.lmax > 3 * self.nside - 1:
            raise where("lmax", self.lmax, f"at most 3*nside-1 = {3 * self.nside - 1} for nside {self.nside}")
        if self.lmin >= self.lmax:
            raise where("lmin", self.lmin, f"below lmax = {self.lmax}")


@dataclass(frozen=True)
class CosmologySection:
    """Background and primordial parameters (defaults: Planck 2018, as astropy's Planck18)."""
    h0: float = _f(67.66, "float", min=20.0, max=150.0)
    ombh2: float = _f(0.02242, "float", min=0.001, max=0.1)
    omch2: float = _f(0.11933, "float", min=0.001, max=0.9)
    mnu: float = _f(0.06, "float", min=0.0, max=3.0)
    neff: float = _f(3.046, "float", min=0.0, max=10.0)
    tcmb: float = _f(2.7255, "float", min=0.1, max=10.0)
    tau: float = _f(0.0561, "float", min=0.0, max=0.5)
    a_s: float = _f(2.105e-9, "float", min=0.0, max=1e-6, open_min=True)
    n_s: float = _f(0.9665, "float", min=0.5, max=1.5)
    pivot_mpc: float = _f(0.05, "float", min=1e-5, max=10.0)
    z_ls: float = _f(1089.92, "float", min=10.0, max=1e5)
    omega_k: float = _f(0.0, "float", min=-0.5, max=0.5)

    def check(self, where):
        pass


@dataclass(frozen=True)
class CalibrateSection:
    """Isotropic Gaussian simulations through the identical prepare + search (pipeline/calibrate.py)."""
    simulations: int = _f(40, "int", min=2, max=1000000)
    spectrum: str = _f("data", "str", choices=("data", "theory", "file"))
    spectrum_file: str | None = _f(None, "path?")
    false_alarm: tuple = _f((0.01, 0.05), "floats")
    significance: float = _f(0.05, "float", min=0.0, max=1.0, open_min=True)
    seed: int = _f(7, "int", min=0)
    noise_uk_arcmin: float = _f(0.0, "float", min=0.0)
    tail: str = _f("gumbel", "str", choices=("gumbel", "genextreme"))
    sim_nside: int = _f(0, "int", min=0, max=8192)
    # supplied simulation maps (a glob or a list, relative to the config): N is their count, replacing
    # ``simulations``; each is masked, prepared and searched exactly like the data
    maps: tuple | None = _f(None, "paths?")
    # noise maps (a glob or a list) added one per Gaussian signal sky (simulation i gets noise map i)
    noise_maps: tuple | None = _f(None, "paths?")
    # per-pixel noise variance (uK^2 after the TUNIT conversion), or hit counts with noise_per_hit_uk
    noise_variance_map: str | None = _f(None, "path?")
    noise_variance_field: int | str = _f(0, "field")
    noise_per_hit_uk: float | None = _f(None, "float?", min=0.0, open_min=True)
    # the data spectrum: mask mode coupling corrected (MASTER) or the f_sky rescaling of old
    coupling: str = _f("master", "str", choices=("master", "fsky"))

    def check(self, where):
        if self.maps and self.noise_maps:
            raise where("noise_maps", list(self.noise_maps), "null when calibrate.maps (complete simulations) is given")
        if self.maps and (self.noise_variance_map or self.noise_uk_arcmin > 0):
            raise where("maps", list(self.maps), "no noise_variance_map or noise_uk_arcmin beside it (supplied "
                        "simulations carry their own noise)")
        if self.noise_per_hit_uk is not None and not self.noise_variance_map:
            raise where("noise_per_hit_uk", self.noise_per_hit_uk, "null unless noise_variance_map holds hit counts")
        if self.noise_variance_map and self.noise_uk_arcmin > 0:
            raise where("noise_uk_arcmin", self.noise_uk_arcmin, "0 when noise_variance_map is given")
        if not self.false_alarm or not all(0.0 < a < 1.0 for a in self.false_alarm):
            raise where("false_alarm", list(self.false_alarm), "a list of rates, each in (0, 1)")
        if self.spectrum == "file" and not self.spectrum_file:
            raise where("spectrum_file", None, "a table of l, C_l [uK^2] when spectrum is 'file'")
        if self.sim_nside and not is_pow2(self.sim_nside):
            raise where("sim_nside", self.sim_nside, "0 (what the prepared map needs) or a power of two")


@dataclass(frozen=True)
class InjectSection:
    """Injection-recovery campaigns (pipeline/inject.py); the space's shape comes from ``topology``."""
    sizes: tuple = _f((), "floats")
    radii_deg: tuple = _f((30.0, 40.0, 50.0, 60.0, 70.0), "floats")
    realizations: int = _f(3, "int", min=1, max=100000)
    seed: int = _f(11, "int", min=0)
    mode: str = _f("targeted", "str", choices=("targeted", "full"))
    false_alarm: float | None = _f(None, "float?", min=0.0, max=1.0, open_min=True)
    threshold: str = _f("global", "str", choices=("global", "local"))
    radius_tol_deg: float = _f(2.0, "float", min=0.0, max=45.0)
    centre_tol_deg: float = _f(0.0, "float", min=0.0, max=90.0)
    noise_uk_arcmin: float | None = _f(None, "float?", min=0.0)
    beam_fwhm_deg: float | None = _f(None, "float?", min=0.0, max=180.0)
    random_orientation: bool = _f(True, "bool")
    physics: str = _f("full", "str", choices=("sw", "full"))
    omega_k: tuple = _f((), "floats", help="spherical spaces: campaign curvatures Omega_k (< 0), one size R/chi "
                        "each (replaces sizes and radii_deg); [] = use sizes or radii_deg")

    def check(self, where):
        if not all(-0.5 <= x < 0.0 for x in self.omega_k):
            raise where("omega_k", list(self.omega_k), "a list of curvatures with -0.5 <= omega_k < 0")
        if not self.sizes and not self.radii_deg:
            raise where("sizes", [], "a list of sizes (chi) or inject.radii_deg")
        if not all(x > 0 for x in self.sizes):
            raise where("sizes", list(self.sizes), "sizes > 0 in units of chi")
        if not all(0 < r < 90 for r in self.radii_deg):
            raise where("radii_deg", list(self.radii_deg), "radii in (0, 90) degrees")


@dataclass(frozen=True)
class BoundSection:
    """Smallest detectable radius -> lower bound on the size of space (pipeline/bound.py)."""
    recovery: float = _f(0.95, "float", min=0.0, max=1.0, open_min=True)
    false_alarm: float | None = _f(None, "float?", min=0.0, max=1.0, open_min=True)
    chi_gpc: float | None = _f(None, "float?", min=0.0, open_min=True)
    point_fraction: bool = _f(False, "bool")

    def check(self, where):
        pass


@dataclass(frozen=True)
class ExcludeSection:
    """Which parameter points of the flat spaces the data exclude (pipeline/exclude.py)."""
    spaces: tuple = _f((), "strs")
    points: str | None = _f(None, "path?")
    sampling: str = _f("sobol", "str", choices=("sobol", "halton", "grid"))
    samples: int = _f(1024, "int", min=1, max=10000000)
    seed: int = _f(13, "int", min=0)
    length_range_chi: tuple = _f((0.2, 4.0), "floats", length=2)
    angle_range_deg: tuple = _f((60.0, 120.0), "floats", length=2)
    twists_deg: tuple = _f((0.0, 60.0, 90.0, 120.0, 180.0), "floats")
    open_range_chi: float = _f(2.0, "float", min=0.0)
    alpha_min_deg: float | None = _f(None, "float?", min=0.0, max=90.0, open_min=True)
    coverage: str = _f("general", "str", choices=("general", "antipodal", "run"))
    antipodal_tol_deg: float = _f(1.0, "float", min=0.0, max=90.0)
    # spherical spaces (pipeline/exclude_spherical.py)
    spherical: tuple = _f((), "strs", help="spherical families to exclude versus omega_k: L(p,1), L(p,q), D*4n, "
                          "T*, O*, I* or named spaces such as L(8,3); [] = none (or a spherical topology.space)")
    omega_k: tuple = _f((), "floats", help="curvatures Omega_k (< 0) at which the spherical spaces are judged; "
                        "[] = cosmology.omega_k")
    p_max: int = _f(40, "int", min=2, max=1000, help="largest group order p of L(p,q) and n of D*4n tabulated")

    def check(self, where):
        for ok in self.omega_k:
            if not -0.5 <= ok < 0.0:
                raise where("omega_k", list(self.omega_k), "a list of curvatures with -0.5 <= omega_k < 0")
        from .topology import spherical

        for f in self.spherical:
            if f not in ("L(p,1)", "L(p,q)", "D*4n") and not spherical.is_spherical_name(f):
                raise where("spherical", list(self.spherical), "a list among L(p,1), L(p,q), D*4n, T*, O*, I* or "
                            "named spaces such as L(8,3)")
            if spherical.is_spherical_name(f):
                try:
                    spherical.check_name(f)
                except spherical.SphericalParamError as exc:
                    raise where("spherical", list(self.spherical), exc.allowed)
        allowed = tuple(f"E{i}" for i in range(1, 18))
        for s in self.spaces:
            if s not in allowed:
                raise where("spaces", list(self.spaces), "a list of spaces among " + ", ".join(allowed))
        lo, hi = self.length_range_chi
        if not 0 < lo <= hi:
            raise where("length_range_chi", list(self.length_range_chi), "[min, max] chi with 0 < min <= max")
        lo, hi = self.angle_range_deg
        if not 0 < lo <= hi < 180:
            raise where("angle_range_deg", list(self.angle_range_deg), "[min, max] degrees with 0 < min <= max < 180")
        from .topology.manifolds import _twist_order

        if not self.twists_deg or any(_twist_order(t) is None for t in self.twists_deg):
            raise where("twists_deg", list(self.twists_deg), "a list of twists 360 p / q degrees with q <= 12")
        if self.points and len(self.spaces) > 1:
            raise where("spaces", list(self.spaces), "at most one space with listed points (or use topology.space)")


@dataclass(frozen=True)
class ConsistencySection:
    """Matching the top candidates of several maps (map.paths) across the maps (pipeline/consistency.py)."""
    # top candidates of each map to match across the maps; null = report.circles
    top: int | None = _f(None, "int?", min=1, max=1000)
    # centres (in either order) within this angle [deg]; null = centre_steps centre-grid steps
    centre_tol_deg: float | None = _f(None, "float?", min=0.0, max=180.0, open_min=True)
    centre_steps: float = _f(2.0, "float", min=0.0, max=50.0, open_min=True)
    # radii within this [deg]; null = the radius step of search.radius_deg
    radius_tol_deg: float | None = _f(None, "float?", min=0.0, max=90.0, open_min=True)

    def check(self, where):
        pass


@dataclass(frozen=True)
class ReportSection:
    """Figures and summary (pipeline/report.py)."""
    circles: int = _f(3, "int", min=0, max=50)
    dpi: int = _f(110, "int", min=40, max=600)

    def check(self, where):
        pass


SECTIONS = {
    "map": MapSection,
    "prepare": PrepareSection,
    "search": SearchSection,
    "output": OutputSection,
    "compute": ComputeSection,
    "topology": TopologySection,
    "sky": SkySection,
    "cosmology": CosmologySection,
    "calibrate": CalibrateSection,
    "inject": InjectSection,
    "bound": BoundSection,
    "report": ReportSection,
    "exclude": ExcludeSection,
    "consistency": ConsistencySection,
}


@dataclass(frozen=True)
class RunConfig:
    map: MapSection = field(default_factory=MapSection)
    prepare: PrepareSection = field(default_factory=PrepareSection)
    search: SearchSection = field(default_factory=SearchSection)
    output: OutputSection = field(default_factory=OutputSection)
    compute: ComputeSection = field(default_factory=ComputeSection)
    topology: TopologySection = field(default_factory=TopologySection)
    sky: SkySection = field(default_factory=SkySection)
    cosmology: CosmologySection = field(default_factory=CosmologySection)
    calibrate: CalibrateSection = field(default_factory=CalibrateSection)
    inject: InjectSection = field(default_factory=InjectSection)
    bound: BoundSection = field(default_factory=BoundSection)
    report: ReportSection = field(default_factory=ReportSection)
    exclude: ExcludeSection = field(default_factory=ExcludeSection)
    consistency: ConsistencySection = field(default_factory=ConsistencySection)
    source: str = ""          # the file the config came from (not a YAML key)
    present: tuple = ()       # the sections the YAML file named

    def to_dict(self) -> dict:
        out = {}
        for name in SECTIONS:
            sec = getattr(self, name)
            out[name] = {k: (list(v) if isinstance(v, tuple) else v) for k, v in dataclasses.asdict(sec).items()}
        return out

    def hash(self) -> str:
        """Hash of the resolved config (all sections), stable across runs."""
        blob = json.dumps(self.to_dict(), sort_keys=True, default=str).encode()
        return hashlib.sha256(blob).hexdigest()[:16]

    def section_hash(self, *names) -> str:
        d = self.to_dict()
        blob = json.dumps({n: d[n] for n in names}, sort_keys=True, default=str).encode()
        return hashlib.sha256(blob).hexdigest()[:16]

    def replace(self, **sections) -> "RunConfig":
        return dataclasses.replace(self, **sections)


# --------------------------------------------------------------------------- validation
def _fmt(v):
    if isinstance(v, str):
        return repr(v)
    return json.dumps(v, default=str)


def _checker(source, path):
    def where(key, found, allowed):
        return InputError(f"{source}: {path}.{key}: found {_fmt(found)}; allowed: {allowed}")
    return where


def _coerce(source, keypath, value, meta, base_dir):
    kind = meta["kind"]
    optional = kind.endswith("?")
    kind = kind.rstrip("?")

    def bad(allowed):
        return InputError(f"{source}: {keypath}: found {_fmt(value)}; allowed: {allowed}")

    if value is None:
        if optional:
            return None
        raise bad(f"a value of type {kind}")
    if kind == "bool":
        if not isinstance(value, bool):
            raise bad("true or false")
        return value
    if kind == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            raise bad("an integer" + _range_text(meta))
        _check_range(value, meta, bad)
        if meta.get("pow2") and not is_pow2(value):
            raise bad("a power of two (1, 2, 4, 8, ...)")
        return value
    if kind == "float":
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise bad("a number" + _range_text(meta))
        _check_range(value, meta, bad)
        return float(value)
    if kind in ("str", "path"):
        if not isinstance(value, str) or not value:
            raise bad("a non-empty string" if "choices" not in meta else " | ".join(meta["choices"]))
        if "choices" in meta and value not in meta["choices"]:
            raise bad(" | ".join(meta["choices"]))
        if kind == "path":
            p = Path(value).expanduser()
            if not p.is_absolute() and base_dir is not None:
                p = base_dir / p
            return str(p)
        return value
    if kind == "floats":
        n = meta.get("length")
        if not isinstance(value, (list, tuple)) or (n is not None and len(value) != n) or not all(
            isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x) for x in value
        ):
            raise bad(f"a list of {n if n else 'some'} numbers")
        return tuple(float(x) for x in value)
    if kind == "strs":
        if not isinstance(value, (list, tuple)) or not all(isinstance(x, str) and x for x in value):
            raise bad("a list of names")
        return tuple(value)
    if kind == "field":
        if isinstance(value, bool) or not isinstance(value, (int, str)) or (isinstance(value, int) and value < 0) \
                or (isinstance(value, str) and not value.strip()):
            raise bad("a column index >= 0 or a column name (e.g. I_STOKES, TEMPERATURE)")
        return value
    if kind == "paths":
        items = [value] if isinstance(value, str) else value
        if not isinstance(items, (list, tuple)) or not items or not all(isinstance(x, str) and x for x in items):
            raise bad("a file pattern (glob) or a list of file paths")
        out = []
        for x in items:
            q = Path(x).expanduser()
            if not q.is_absolute() and base_dir is not None:
                q = base_dir / q
            out.append(str(q))
        return tuple(out)
    if kind == "any":
        return value
    raise TypeError(f"unknown field kind {kind}")


def _range_text(meta):
    parts = []
    if "min" in meta:
        parts.append((">" if meta.get("open_min") else ">=") + f" {meta['min']}")
    if "max" in meta:
        parts.append(f"<= {meta['max']}")
    return (" " + " and ".join(parts)) if parts else ""


def _check_range(value, meta, bad):
    lo, hi = meta.get("min"), meta.get("max")
    if lo is not None and (value < lo or (meta.get("open_min") and value == lo)):
        raise bad("a number" + _range_text(meta))
    if hi is not None and value > hi:
        raise bad("a number" + _range_text(meta))


def _suggest(key, choices):
    close = difflib.get_close_matches(key, list(choices), n=1, cutoff=0.5)
    return f" (did you mean '{close[0]}'?)" if close else ""


def build_section(cls, raw, source, path, base_dir):
    """Validate one section's mapping into its frozen dataclass."""
    if raw is None:
        raw = {}
    if not isinstance(raw, dict):
        raise InputError(f"{source}: {path}: found {_fmt(raw)}; allowed: a mapping of keys")
    fields = {f.name: f for f in dataclasses.fields(cls)}
    values = {}
    for key, value in raw.items():
        if key not in fields:
            raise InputError(
                f"{source}: {path}.{key}: unknown key{_suggest(str(key), fields)}; allowed: {', '.join(fields)}"
            )
        values[key] = _coerce(source, f"{path}.{key}", value, fields[key].metadata, base_dir)
    sec = cls(**values)
    sec.check(_checker(source, path))
    return sec


def config_from_dict(raw: dict, source: str = "<config>", base_dir: Path | None = None) -> RunConfig:
    if not isinstance(raw, dict):
        raise InputError(f"{source}: top level: found {type(raw).__name__}; allowed: a mapping of sections")
    sections = {}
    for key, value in raw.items():
        if key not in SECTIONS:
            raise InputError(
                f"{source}: {key}: unknown section{_suggest(str(key), SECTIONS)}; allowed: {', '.join(SECTIONS)}"
            )
        sections[key] = build_section(SECTIONS[key], value, source, key, base_dir)
    cfg = RunConfig(**sections, source=source, present=tuple(raw))
    _cross_checks(cfg)
    return cfg


def _cross_checks(cfg: RunConfig):
    """Checks between sections (each names the key to change)."""
    for hook in CROSS_CHECKS:
        hook(cfg)


def _curvature_matches_space(cfg: RunConfig):
    """A spherical space needs omega_k < 0; a flat space named in the file needs omega_k = 0."""
    from .topology.spherical import is_spherical_name

    if "topology" not in cfg.present:
        return
    ok = cfg.cosmology.omega_k
    if is_spherical_name(cfg.topology.space) and ok >= 0.0:
        raise InputError(f"{cfg.source}: cosmology.omega_k: found {_fmt(ok)}; allowed: a negative value "
                         f"(positive curvature) for the spherical space {cfg.topology.space}")
    if not is_spherical_name(cfg.topology.space) and ok != 0.0:
        raise InputError(f"{cfg.source}: cosmology.omega_k: found {_fmt(ok)}; allowed: 0 for the flat space "
                         f"{cfg.topology.space}")


CROSS_CHECKS: list = [_curvature_matches_space]


# --------------------------------------------------------------------------- YAML
class DuplicateKeyError(yaml.YAMLError):
    """A key given twice in one YAML mapping (the message names the key path and both lines)."""


class UniqueKeyLoader(yaml.SafeLoader):
    """PyYAML's SafeLoader (plain tags only) that refuses a key given twice in one mapping, at every level.

    Plain YAML lets the last of two equal keys win silently; a second
    ``search:`` section would replace the first.  Merge keys (``<<``) keep
    their YAML meaning: keys given beside them override the merged ones.
    """

    def get_single_data(self):
        node = self.get_single_node()
        if node is None:
            return None
        self._check_unique(node, (), set())
        return self.construct_document(node)

    def _check_unique(self, node, path, seen):
        if id(node) in seen:         # an alias of a node already checked
            return
        seen.add(id(node))
        if isinstance(node, yaml.MappingNode):
            first = {}
            for key_node, value_node in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge":
                    self._check_unique(value_node, path, seen)
                    continue
                if isinstance(key_node, yaml.ScalarNode):
                    key = self.construct_object(key_node)
                    try:
                        hash(key)
                    except TypeError:
                        key = ("scalar", key_node.tag, key_node.value)
                    line = key_node.start_mark.line + 1
                    if key in first:
                        where = ".".join(str(p) for p in (*path, key))
                        raise DuplicateKeyError(f"duplicate key '{where}' at lines {first[key]} and {line} "
                                                "(YAML would silently keep the last)")
                    first[key] = line
                    self._check_unique(value_node, (*path, key), seen)
                else:
                    self._check_unique(value_node, (*path, "?"), seen)
        elif isinstance(node, yaml.SequenceNode):
            for i, item in enumerate(node.value):
                self._check_unique(item, (*path, f"[{i}]"), seen)


def safe_load_unique(text):
    """``yaml.safe_load`` that refuses duplicate keys (:class:`UniqueKeyLoader`)."""
    loader = UniqueKeyLoader(text)
    try:
        return loader.get_single_data()
    finally:
        loader.dispose()


# --------------------------------------------------------------------------- size limits
MAX_RADII = 100_000          # radii of one search (search.radius_deg)
MAX_PAIRS = 1e15             # circle pairs of one search, all radii (both senses, all twists each)
_PAIRS_PER_CHUNK = 2_000_000  # twinring.search.TARGET_PAIRS_PER_CHUNK (kept equal; not imported: search is heavy)


def _gb(nbytes):
    return f"{nbytes / 1e9:.3g} GB"


def search_size(cfg: "RunConfig") -> dict:
    """What the configured search needs, estimated from the config alone (before any work).

    Returns ``centres`` (None for the listed family, whose table is read later),
    ``radii``, ``samples`` (ring samples at the largest radius), ``pairs`` (per
    radius), ``chunk_bytes`` (a lower estimate of one chunk's peak memory:
    ring synthesis, spectra, pair kernel, a_lm; see ``merge.chunk_memory_gb``),
    ``pool_bytes`` (the best pairs all chunks send back, held together) and
    ``prepare_bytes`` (the prepared map, mask and a_lm).
    """
    s, prep = cfg.search, cfg.prepare
    lo, hi, step = s.radius_deg
    n_r = int(math.floor((hi - lo) / step + 1e-9)) + 1
    lmax = int(prep.lmax)
    alm_bytes = 16 * (lmax + 1) * (lmax + 2) // 2
    npix = 12 * int(prep.nside) ** 2
    ns = max(2 * (int(math.ceil(lmax * math.sin(math.radians(min(hi, 90.0))))) + s.sample_margin), 16)
    out = dict(radii=n_r, samples=ns, centres=None, pairs=None, chunk_bytes=None, pool_bytes=None,
               prepare_bytes=3 * 8 * npix + alm_bytes)
    if s.family == "listed":
        return out
    n = 12 * int(s.nside_centers) ** 2
    if s.family == "antipodal":
        pairs = n // 2
    else:
        smin, smax = s.separation_deg
        frac = max((math.cos(math.radians(smin)) - math.cos(math.radians(smax))) / 2, 0.0)
        pairs = int(n * (n - 1) / 2 * frac)
        if s.method == "fast":
            pairs = min(pairs, n * s.screen_setup()[0])
    blocks = max(1, math.ceil(pairs / _PAIRS_PER_CHUNK))
    chunk = 56 * n * ns + 16 * n * (ns // 2 + 1) + 64 * min(pairs, _PAIRS_PER_CHUNK) + alm_bytes
    pool = n_r * blocks * 2 * min(s.keep_per_radius, max(pairs, 1)) * 33
    out.update(centres=n, pairs=pairs, chunk_bytes=chunk, pool_bytes=pool)
    return out


def _check_sizes(cfg: "RunConfig"):
    """Refuse, before any work, a search past ``compute.memory_gb`` or the sane limits (one line each)."""
    src = cfg.source or "<config>"
    mem = cfg.compute.memory_gb
    budget = mem * 1e9
    z = search_size(cfg)
    s = cfg.search
    if z["radii"] > MAX_RADII:
        raise InputError(f"{src}: search.radius_deg: found {list(s.radius_deg)}, {z['radii']:.3g} radii; allowed: "
                         f"at most {MAX_RADII} radii (a larger step)")
    if z["prepare_bytes"] > budget:
        raise InputError(f"{src}: prepare.nside: found {cfg.prepare.nside}; the prepared map would need about "
                         f"{_gb(z['prepare_bytes'])}; allowed: at most compute.memory_gb = {mem:g} GB "
                         "(a smaller prepare.nside, or more compute.memory_gb)")
    if z["centres"] is None:
        return
    what = (f"{z['centres']:,} centres (search.nside_centers {s.nside_centers}) x {z['radii']} radii, "
            f"{z['samples']} samples per ring at prepare.lmax {cfg.prepare.lmax}")
    total = z["pairs"] * z["radii"]
    if total > MAX_PAIRS:
        raise InputError(f"{src}: search.nside_centers: {what} would scan {total:.3g} circle pairs; allowed: at "
                         f"most {MAX_PAIRS:.0e} (a smaller search.nside_centers, fewer radii or method 'fast')")
    if z["chunk_bytes"] > budget:
        raise InputError(f"{src}: search.nside_centers: {what} would need about {_gb(z['chunk_bytes'])} per "
                         f"chunk; allowed: at most compute.memory_gb = {mem:g} GB (a smaller search.nside_centers "
                         "or prepare.lmax, or more compute.memory_gb)")
    if z["pool_bytes"] > budget:
        raise InputError(f"{src}: search.keep_per_radius: {what} would keep about {_gb(z['pool_bytes'])} of best "
                         f"pairs; allowed: at most compute.memory_gb = {mem:g} GB (a smaller "
                         "search.keep_per_radius or search.nside_centers, or more compute.memory_gb)")


CROSS_CHECKS.append(_check_sizes)


def load_config(path, overrides: dict | None = None) -> RunConfig:
    """Read a YAML run config (safe loading only, duplicate keys refused) and validate it."""
    p = Path(path).expanduser()
    if not p.exists():
        raise InputError(f"{p}: config file not found")
    try:
        text = p.read_text()
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{p}: cannot read config ({exc.__class__.__name__}: {exc})")
    try:
        raw = safe_load_unique(text)
    except DuplicateKeyError as exc:
        raise InputError(f"{p}: {exc}; allowed: each key once per mapping")
    except yaml.YAMLError as exc:
        first = str(exc).splitlines()[0] if str(exc) else exc.__class__.__name__
        mark = getattr(exc, "problem_mark", None)
        at = f" at line {mark.line + 1}" if mark is not None else ""
        raise InputError(f"{p}: not valid YAML{at}: {first}; allowed: plain YAML mappings (no tags)")
    if raw is None:
        raw = {}
    if not isinstance(raw, dict):
        raise InputError(f"{p}: top level: found {type(raw).__name__}; allowed: a mapping of sections")
    if overrides:
        raw = _merge(raw, overrides)
    return config_from_dict(raw, source=str(p), base_dir=p.resolve().parent)


def _merge(raw, overrides):
    out = dict(raw)
    for k, v in overrides.items():
        if isinstance(v, dict) and isinstance(out.get(k), dict):
            out[k] = _merge(out[k], v)
        else:
            out[k] = v
    return out


def dump_config(cfg: RunConfig) -> str:
    return yaml.safe_dump(cfg.to_dict(), sort_keys=False)
