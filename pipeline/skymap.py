"""HEALPix sky maps and masks: FITS reading, validation, units, ordering, writing.

Reading (:func:`load_map`)
    * The map is the first binary-table extension of a FITS file; the column is
      chosen by ``field``: a 0-based index (the ``PIXEL`` column of a cut-sky file
      is not counted) or a column name (``TTYPEn``, case-insensitive; a
      temperature name such as ``I_STOKES``, ``TEMPERATURE``, ``T`` or ``I`` also
      finds the one temperature column under another of these names).
    * A column whose name says polarisation (``Q_STOKES``, ``U_POLARISATION``,
      ``Q``, ``E``, ``B``, ...) is refused as a temperature map unless
      ``allow_polarisation`` (``map.allow_polarisation``) is given.  Only that one column is read, through astropy's memory map, and
      converted to float64 once, so an Nside 2048 map (50 M pixels) costs about
      0.4 GB for the values plus 0.4 GB for the mask.
    * ``ORDERING`` RING or NESTED (NESTED is converted with ``healpy.reorder``);
      no ``ORDERING`` keyword means RING (as healpy assumes), with a note.
    * ``NSIDE`` must agree with the pixel count; without ``NSIDE`` (and without
      ``PIXTYPE = 'HEALPIX'``) the pixel count must be 12 n^2 with n a power of two.
    * ``TUNITn`` of the column: K, mK, uK (with or without a ``_CMB`` suffix;
      thermodynamic CMB temperature) are converted to uK.  No unit: uK is assumed
      and a note says so.  Other units (e.g. Rayleigh-Jeans brightness temperature
      K_RJ, MJy/sr) are refused: convert them to thermodynamic K_CMB first.
    * What was read (unit, ordering, frame, column) is kept on the
      :class:`SkyMap` and, through :func:`input_provenance`, written into every
      output's provenance.
    * UNSEEN (``healpy.UNSEEN``), NaN and +-inf pixels become masked.
    * Cut-sky files (``INDXSCHM = 'EXPLICIT'``, a ``PIXEL`` column) are read too;
      pixels not listed are masked.
    * The mask is a HEALPix map in its own file (or another column of the map's
      file): value >= ``mask_threshold`` means "use", anything else is masked.
      A NESTED mask is reordered; a mask of another Nside is regridded
      (``healpy.ud_grade``, which averages or repeats sub-pixels, then the
      threshold) and a note records it.  Mask and map declaring different
      ``COORDSYS`` frames is an error.

Every bad input raises :class:`twinring.config.InputError` with one line
``"<path>: <what was found>; allowed: <what is allowed>"``.

Writing (:func:`write_map`) goes through :func:`twinring.results.atomic_path`.
"""
from __future__ import annotations

import logging
import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import healpy as hp

from .config import InputError
from .results import atomic_path, file_checksum

log = logging.getLogger("twinring.skymap")

# Factors to uK for the accepted units (keys are normalised: lower case, no
# spaces/underscores/brackets, a trailing "cmb" or "thermo" removed).
UNIT_TO_UK = {
    "k": 1e6,
    "kelvin": 1e6,
    "mk": 1e3,
    "millik": 1e3,
    "millikelvin": 1e3,
    "uk": 1.0,
    "\u00b5k": 1.0,   # micro sign
    "\u03bck": 1.0,   # greek mu
    "muk": 1.0,
    "microk": 1.0,
    "microkelvin": 1.0,
}
NO_UNIT = {"", "none", "unknown", "n/a", "na"}
ALLOWED_UNITS = "K, mK, uK (thermodynamic; also written K_CMB, mK_CMB, uK_CMB), or no unit (uK assumed)"
TEMPERATURE_NAMES = ("TEMPERATURE", "I_STOKES", "I", "T", "TEMP", "INTENSITY", "I_STOKES_INT", "TT")
POL_HINT = ("a temperature column (I_STOKES, TEMPERATURE, ...), or map.allow_polarisation: true to search "
            "a polarisation column on purpose")

FRAMES = {
    "G": "G", "GAL": "G", "GALACTIC": "G",
    "C": "C", "Q": "C", "CEL": "C", "CELESTIAL": "C", "EQ": "C", "EQU": "C", "EQUATORIAL": "C", "ICRS": "C",
    "FK5": "C",
    "E": "E", "ECL": "E", "ECLIPTIC": "E",
}

_UNSEEN_TOL = 1e-5 * abs(hp.UNSEEN)
_CHUNK = 1 << 22   # pixels per block in element-wise passes over big maps


@dataclass(frozen=True, eq=False)
class SkyMap:
    """A temperature map in uK, RING order, with its 0/1 mask (1 = use)."""

    values: np.ndarray          # float64 uK, RING, masked pixels set to 0
    mask: np.ndarray            # float64 0/1, RING
    nside: int
    unit_in: str | None         # the file's TUNIT as read (None: absent)
    frame: str | None           # COORDSYS normalised to G / C / E (None: not declared)
    checksum: str               # sha256 (16 hex digits) of the map file
    notes: list = field(default_factory=list)
    path: str = ""
    mask_path: str | None = None
    mask_checksum: str | None = None
    column: str = ""            # TTYPE of the column read
    field: int = 0              # its 0-based index among the map columns
    ordering: str = "RING"      # the file's ORDERING (the values are always RING)

    @property
    def npix(self) -> int:
        return self.values.size

    @property
    def fsky(self) -> float:
        return float(self.mask.sum()) / self.mask.size


# --------------------------------------------------------------------------- helpers
def _one_line(text) -> str:
    s = " ".join(str(text).split())
    return s if s else "no detail"


def _bad(path, found, allowed) -> InputError:
    return InputError(f"{path}: {_one_line(found)}; allowed: {allowed}")


def normalise_unit(unit):
    """Return the factor to uK for a TUNIT string, or None for 'no unit'; raise KeyError if unknown."""
    if unit is None:
        return None
    u = str(unit).strip()
    key = u.lower()
    for ch in " _-()[]{}":
        key = key.replace(ch, "")
    if key in NO_UNIT:
        return None
    for suffix in ("cmb", "thermo", "th"):
        if key.endswith(suffix) and key[: -len(suffix)] in UNIT_TO_UK:
            key = key[: -len(suffix)]
            break
    if key not in UNIT_TO_UK:
        raise KeyError(u)
    return UNIT_TO_UK[key]


def is_polarisation_name(name) -> bool:
    """True when a column name (TTYPE) says polarisation: Q_STOKES, U_POLARISATION, Q, U, E, B, P, POL...

    Healpix/Planck conventions (common practice, no source): I, Q, U maps are
    written as ``I_STOKES, Q_STOKES, U_STOKES`` or ``TEMPERATURE, Q_POLARISATION,
    U_POLARISATION``.
    """
    n = str(name or "").strip().upper()
    if not n:
        return False
    if "POLARI" in n or n.startswith("POL"):
        return True
    head = n.replace("-", "_").replace(" ", "_").split("_")[0]
    return head in ("Q", "U", "E", "B", "P", "QQ", "UU", "QU", "EE", "BB", "EB", "TE", "TB")


def unit_hint(unit) -> str:
    """Extra words for a refused unit (brightness temperature, intensity)."""
    u = str(unit or "").lower()
    if "rj" in u or "brightness" in u or "ant" in u:
        return " (Rayleigh-Jeans brightness temperature: convert to thermodynamic K_CMB first)"
    if "jy" in u or "w/" in u or "mjy" in u:
        return " (an intensity unit: convert to thermodynamic K_CMB first)"
    return ""


def resolve_field(path, names, field):
    """0-based index among ``names`` (the map columns) of ``field``: an index or a column name."""
    listed = ", ".join(f"{i}={n}" for i, n in enumerate(names))
    if isinstance(field, str) and not field.strip().lstrip("-").isdigit():
        want = field.strip().upper()
        upper = [str(n).strip().upper() for n in names]
        if want in upper:
            return upper.index(want)
        if want in TEMPERATURE_NAMES:
            hits = [i for i, n in enumerate(upper) if n in TEMPERATURE_NAMES]
            if len(hits) == 1:
                return hits[0]
        raise _bad(path, f"field {field!r} requested but the table's map columns are {listed}",
                   "a column name listed or an index 0 to " + str(len(names) - 1))
    idx = int(field)
    if idx < 0 or idx >= len(names):
        raise _bad(path, f"field {idx} requested but the table has {len(names)} map column(s) ({listed})",
                   f"field 0 to {len(names) - 1}")
    return idx


def normalise_frame(value):
    if value is None:
        return None
    s = str(value).strip().upper()
    if not s:
        return None
    return FRAMES.get(s, s)


def _is_pow2(n):
    return n >= 1 and (n & (n - 1)) == 0


def _open_table(path, what):
    """Open ``path`` (memory-mapped) and return (hdulist, first binary-table HDU)."""
    from astropy.io import fits

    p = Path(path)
    if not p.exists():
        raise _bad(p, f"{what} file not found", "an existing HEALPix FITS file")
    if p.is_dir():
        raise _bad(p, f"{what} path is a directory", "a HEALPix FITS file")
    try:
        with open(p, "rb") as fh:
            head = fh.read(80)
    except OSError as exc:
        raise _bad(p, f"cannot read {what} file ({exc.strerror or exc})", "a readable HEALPix FITS file")
    if not head:
        raise _bad(p, f"{what} file is empty", "a HEALPix FITS file")
    gz = head.startswith(b"\x1f\x8b")
    if not head.startswith(b"SIMPLE  =") and not gz:
        raise _bad(p, f"{what} file is not FITS (no SIMPLE card at the start)", "a HEALPix FITS file")
    size = p.stat().st_size
    if not gz and size % 2880:
        raise _bad(p, f"{what} file is truncated ({size} bytes, not a whole number of 2880-byte FITS blocks)",
                   "a complete HEALPix FITS file")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            hdul = fits.open(p, memmap=True, mode="readonly")
            hdul.verify("silentfix")
            table = None
            for hdu in hdul[1:]:
                if isinstance(hdu, fits.BinTableHDU):
                    table = hdu
                    break
    except OSError as exc:
        raise _bad(p, f"{what} file is not readable FITS ({exc})", "a HEALPix FITS file")
    except Exception as exc:  # astropy raises assorted errors on corrupt files
        raise _bad(p, f"{what} file is corrupt FITS ({exc.__class__.__name__}: {exc})", "a HEALPix FITS file")
    if table is None:
        hdul.close()
        raise _bad(p, f"{what} file has no binary-table extension",
                   "a HEALPix FITS file (map columns in a binary table, PIXTYPE = 'HEALPIX')")
    return hdul, table


def _read_column(path, what, field_index):
    """Read one HEALPix column: returns (values float64 in file order, valid bool or None, info dict)."""
    p = Path(path)
    hdul, table = _open_table(p, what)
    try:
        hdr = table.header
        prim = hdul[0].header

        def key(name):
            if name in hdr:
                return hdr[name]
            return prim.get(name)

        pixtype = key("PIXTYPE")
        nside_kw = key("NSIDE")
        ordering = key("ORDERING")
        indxschm = str(key("INDXSCHM") or "").strip().upper()
        obj = str(key("OBJECT") or "").strip().upper()
        coordsys = key("COORDSYS")
        notes = []

        if pixtype is not None and str(pixtype).strip().upper() != "HEALPIX":
            raise _bad(p, f"PIXTYPE = {str(pixtype).strip()!r}", "PIXTYPE = 'HEALPIX'")

        cols = table.columns
        names = [c.name for c in cols]
        data_cols, pix_col = _data_columns(names, indxschm, obj)
        explicit = pix_col is not None
        if not data_cols:
            raise _bad(p, f"{what} table has no data column", "a HEALPix binary table with at least one map column")
        field_index = resolve_field(p, [names[c] for c in data_cols], field_index)
        ci = data_cols[field_index]
        col = cols[ci]
        unit = col.unit
        nrows = table.header.get("NAXIS2", 0)
        if nrows == 0:
            raise _bad(p, f"{what} table has no rows", "a HEALPix map with 12*Nside^2 pixels")

        # Order matters for memory: the column is viewed through the memory map
        # and copied to float64 exactly once.
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                raw = table.data.field(ci)
                values = np.array(raw, dtype=np.float64, copy=True).reshape(-1)
                del raw
                pixels = None
                if explicit:
                    pixels = np.array(table.data.field(pix_col), dtype=np.int64).reshape(-1)
        except (TypeError, ValueError, OSError, IndexError) as exc:
            raise _bad(p, f"{what} table data cannot be read, file truncated or corrupt "
                       f"({exc.__class__.__name__}: {exc})", "a complete HEALPix FITS file")
        n = values.size

        # --- HEALPix geometry
        if nside_kw is not None:
            try:
                nside = int(nside_kw)
            except (TypeError, ValueError):
                raise _bad(p, f"NSIDE = {nside_kw!r}", "a positive integer power of two")
            if nside < 1 or not _is_pow2(nside):
                raise _bad(p, f"NSIDE = {nside}", "a positive power of two (1, 2, 4, ..., 8192)")
            npix = 12 * nside * nside
            if not explicit and n != npix:
                raise _bad(p, f"{n} pixels in column {col.name!r} but NSIDE = {nside} needs 12*NSIDE^2 = {npix}",
                           "a column of exactly 12*NSIDE^2 pixels")
        else:
            if explicit:
                raise _bad(p, "cut-sky (EXPLICIT) HEALPix table without an NSIDE keyword",
                           "an NSIDE keyword in cut-sky files")
            root = math.isqrt(n // 12) if n % 12 == 0 else 0
            if root < 1 or 12 * root * root != n or not _is_pow2(root):
                if pixtype is None:
                    raise _bad(p, f"no HEALPix keywords (no PIXTYPE, no NSIDE) and {n} pixels, not 12*n^2 "
                               "with n a power of two", "a HEALPix map: PIXTYPE = 'HEALPIX' with NSIDE, "
                               "or 12*Nside^2 pixels")
                raise _bad(p, f"PIXTYPE = 'HEALPIX' without NSIDE and {n} pixels, not 12*Nside^2 with "
                           "Nside a power of two", "12*Nside^2 pixels, Nside a power of two")
            nside = root
            npix = n
            if pixtype is None:
                notes.append(f"{p.name}: no PIXTYPE/NSIDE keywords; Nside {nside} inferred from {n} pixels")

        # --- ordering
        if ordering is None or not str(ordering).strip():
            nest = False
            notes.append(f"{p.name}: no ORDERING keyword; RING assumed")
        else:
            o = str(ordering).strip().upper()
            if o in ("RING",):
                nest = False
            elif o in ("NESTED", "NEST"):
                nest = True
            else:
                raise _bad(p, f"ORDERING = {str(ordering).strip()!r}", "RING or NESTED")

        # --- cut-sky: scatter into a full map
        valid = None
        if explicit:
            if pixels.size != n:
                raise _bad(p, f"PIXEL column has {pixels.size} entries for {n} values",
                           "one pixel index per value")
            if pixels.size and (pixels.min() < 0 or pixels.max() >= npix):
                raise _bad(p, f"pixel index {int(pixels.min() if pixels.min() < 0 else pixels.max())} outside "
                           f"0..{npix - 1} for NSIDE = {nside}", "pixel indices 0 to 12*NSIDE^2-1")
            full = np.zeros(npix, dtype=np.float64)
            full[pixels] = values
            valid = np.zeros(npix, dtype=bool)
            valid[pixels] = True
            del values, pixels
            values = full
            notes.append(f"{p.name}: cut-sky file, {int(valid.sum())} of {npix} pixels listed; the rest masked")

        if nest:
            values = hp.reorder(values, n2r=True)
            if valid is not None:
                valid = hp.reorder(valid.astype(np.uint8), n2r=True).astype(bool)
            notes.append(f"{p.name}: NESTED ordering converted to RING")

        info = dict(nside=nside, unit=unit, frame=normalise_frame(coordsys), coordsys_raw=coordsys,
                    column=col.name, notes=notes, nest=nest, field=field_index)
        return values, valid, info
    finally:
        hdul.close()


def _bad_pixels(values):
    """Boolean array: UNSEEN, NaN or infinite (computed in blocks to bound temporaries)."""
    bad = np.empty(values.size, dtype=bool)
    for s in range(0, values.size, _CHUNK):
        v = values[s:s + _CHUNK]
        bad[s:s + _CHUNK] = ~np.isfinite(v) | (np.abs(v - hp.UNSEEN) <= _UNSEEN_TOL)
    return bad


# --------------------------------------------------------------------------- public: load
def load_map(path, field=0, mask_path=None, mask_field=0, mask_threshold=0.5, allow_polarisation=False) -> SkyMap:
    """Read a HEALPix temperature map (and optional mask) into a :class:`SkyMap` in uK, RING order.

    ``field``: column index or name.  A polarisation column (by its TTYPE) is
    refused unless ``allow_polarisation``.
    """
    p = Path(path)
    if not (0.0 < float(mask_threshold) <= 1.0):
        raise InputError(f"map.mask_threshold: found {mask_threshold}; allowed: a number > 0 and <= 1")
    _check_temperature_column(p, field, allow_polarisation)
    values, valid, info = _read_column(p, "map", field)
    notes = list(info["notes"])
    if allow_polarisation and is_polarisation_name(info["column"]):
        notes.append(f"{p.name}: column {info['column']!r} is polarisation, searched on request "
                     "(map.allow_polarisation)")
    nside = info["nside"]

    # --- units
    unit = info["unit"]
    try:
        factor = normalise_unit(unit)
    except KeyError:
        raise _bad(p, f"unit {str(unit).strip()!r} (TUNIT of column {info['column']!r}){unit_hint(unit)}",
                   ALLOWED_UNITS)
    if factor is None:
        factor = 1.0
        notes.append(f"{p.name}: column {info['column']!r} has no unit; uK assumed")

    # --- bad pixels -> mask
    bad = _bad_pixels(values)
    if valid is not None:
        bad |= ~valid
        del valid
    nbad = int(bad.sum())
    if nbad == values.size:
        raise _bad(p, f"all {values.size} pixels of column {info['column']!r} are UNSEEN, NaN or infinite",
                   "a map with at least some finite pixels")
    if nbad:
        notes.append(f"{p.name}: {nbad} UNSEEN/NaN/inf pixel(s) masked")
    values[bad] = 0.0
    if factor != 1.0:
        values *= factor
    mask = np.empty(values.size, dtype=np.float64)
    np.logical_not(bad, out=mask)   # writes 0.0 / 1.0
    del bad

    frame = info["frame"]
    mask_checksum = None
    if mask_path is not None:
        mp = Path(mask_path)
        mvals, mvalid, minfo = _read_column(mp, "mask", int(mask_field))
        notes.extend(minfo["notes"])
        mframe = minfo["frame"]
        if frame is not None and mframe is not None and frame != mframe:
            raise _bad(mp, f"mask COORDSYS {str(minfo['coordsys_raw']).strip()!r} differs from the map's "
                       f"{str(info['coordsys_raw']).strip()!r} ({p.name})", "a mask in the same frame as the map")
        if frame is None and mframe is not None:
            notes.append(f"{mp.name}: mask declares frame {mframe}, the map declares none")
        mbad = _bad_pixels(mvals)
        if mvalid is not None:
            mbad |= ~mvalid
            del mvalid
        mvals[mbad] = 0.0
        del mbad
        if minfo["nside"] != nside:
            mvals = hp.ud_grade(mvals, nside, order_in="RING", order_out="RING")
            notes.append(f"{mp.name}: mask Nside {minfo['nside']} regridded to the map's Nside {nside} "
                         f"(ud_grade, then threshold {mask_threshold})")
            log.info(notes[-1])
        use = mvals >= mask_threshold
        del mvals
        if not use.any():
            raise _bad(mp, f"mask column {minfo['column']!r} is zero everywhere (no pixel >= {mask_threshold})",
                       "a mask with 1 = use on part of the sky")
        mask *= use
        del use
        if not mask.any():
            raise _bad(mp, "no pixel is both unmasked and valid in the map "
                       f"({p.name})", "a mask that leaves some valid map pixels")
        values *= mask    # masked pixels to 0
        mask_checksum = file_checksum(mp)

    for n in notes:
        log.info(n)
    return SkyMap(values=values, mask=mask, nside=nside, unit_in=None if unit is None else str(unit).strip(),
                  frame=frame, checksum=file_checksum(p), notes=notes, path=str(p),
                  mask_path=None if mask_path is None else str(mask_path), mask_checksum=mask_checksum,
                  column=str(info["column"]), field=int(info["field"]), ordering="NESTED" if info["nest"] else "RING")


def load_config_map(m, path=None) -> SkyMap:
    """:func:`load_map` with the keys of a ``map`` config section (``path`` overrides ``m.path``)."""
    return load_map(path or m.path, field=m.field, mask_path=m.mask, mask_field=m.mask_field,
                    mask_threshold=m.mask_threshold, allow_polarisation=m.allow_polarisation)


def _data_columns(names, indxschm, obj):
    """(indices of the map columns, index of the pixel-index column or None) of a HEALPix table.

    Cut-sky files (``INDXSCHM = 'EXPLICIT'``, or ``OBJECT = 'PARTIAL'`` with PIXEL first) carry a
    pixel-index column that is not a map.
    """
    explicit = indxschm == "EXPLICIT" or (obj == "PARTIAL" and names and names[0].upper() == "PIXEL")
    if not explicit:
        return list(range(len(names))), None
    upper = [n.upper() for n in names]
    pix_col = upper.index("PIXEL") if "PIXEL" in upper else 0
    return [i for i in range(len(names)) if i != pix_col], pix_col


# --------------------------------------------------------------------------- public: what the input is
def header_info(path, field=0) -> dict:
    """Unit, ordering, frame and column of a map file from its header alone (no pixel is read)."""
    p = Path(path)
    hdul, table = _open_table(p, "map")
    try:
        hdr, prim = table.header, hdul[0].header

        def key(name):
            return hdr[name] if name in hdr else prim.get(name)

        names = list(table.columns.names)
        idx, _ = _data_columns(names, str(key("INDXSCHM") or "").strip().upper(),
                               str(key("OBJECT") or "").strip().upper())
        data = [names[c] for c in idx]
        if not data:
            raise _bad(p, "map table has no data column", "a HEALPix binary table with at least one map column")
        i = resolve_field(p, data, field)
        col = table.columns[data[i]]
        unit = col.unit
        ordering = str(key("ORDERING") or "").strip().upper() or "RING (no ORDERING keyword)"
        frame = normalise_frame(key("COORDSYS"))
        return {"column": str(col.name), "field": i, "unit": None if unit is None else str(unit).strip(),
                "ordering": ordering, "frame": frame, "nside": key("NSIDE")}
    finally:
        hdul.close()


def _check_temperature_column(p, field, allow_polarisation):
    if allow_polarisation:
        return
    info = header_info(p, field)
    if is_polarisation_name(info["column"]):
        raise _bad(p, f"field {field!r} is column {info['column']!r}, a polarisation map, requested as temperature",
                   POL_HINT)


def unit_text(unit) -> str:
    """The input unit as recorded: the TUNIT string, or a statement that none was given."""
    return "none given (uK assumed)" if unit is None or not str(unit).strip() else str(unit).strip()


def input_provenance(map_section) -> dict:
    """Provenance keys describing the data map as read: unit, ordering, frame, column (header only)."""
    m = map_section
    if not getattr(m, "path", None) or not Path(m.path).exists():
        return {}
    info = header_info(m.path, m.field)
    try:
        factor = normalise_unit(info["unit"])
    except KeyError:
        factor = None
    return {"map_unit": unit_text(info["unit"]),
            "map_unit_to_uK": 1.0 if factor is None else float(factor),
            "map_ordering": info["ordering"],
            "map_frame": info["frame"] or "not declared (no COORDSYS)",
            "map_field": f"{info['field']} ({info['column']})",
            "map_polarisation_allowed": bool(getattr(m, "allow_polarisation", False))}


# --------------------------------------------------------------------------- public: write
def _header_value(v):
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (int, np.integer)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        return float(v)
    if v is None:
        return ""
    return str(v)[:60]


def write_map(path, maps_uK, *, extra_header=None, provenance=None, column_names=None, nest=False,
              coord=None, column_units="uK", dtype=np.float64):
    """Write one map or a sequence of maps (uK) as a HEALPix FITS binary table, atomically.

    ``extra_header``: list of ``(key, value)`` or ``(key, value, comment)``.
    ``provenance``: dict written as header cards (keys upper-cased; keys longer
    than 8 characters become HIERARCH cards; string values cut to 60 characters).
    ``nest``: the given arrays are in NESTED order (written with ORDERING = NESTED).
    ``coord``: 'G', 'C' or 'E' for the COORDSYS keyword.
    ``column_units``: one string for all columns or one per column.
    """
    path = Path(path)
    if isinstance(maps_uK, np.ndarray) and maps_uK.ndim == 1:
        maps = [maps_uK]
    else:
        maps = [np.asarray(m) for m in maps_uK]
    npix = maps[0].size
    for m in maps:
        if m.size != npix or not hp.isnpixok(npix):
            raise ValueError(f"write_map: arrays of {m.size} pixels; need equal sizes of 12*Nside^2")
    cards = []
    for item in extra_header or []:
        k, v, *c = item
        cards.append((str(k).upper(), _header_value(v), *(c[:1] if c else [])))
    for k, v in (provenance or {}).items():
        cards.append((str(k).upper(), _header_value(v)))
    if column_names is not None and len(column_names) != len(maps):
        raise ValueError("write_map: one column name per map")
    units = column_units if isinstance(column_units, (list, tuple)) else [column_units] * len(maps)
    with atomic_path(path) as tmp, warnings.catch_warnings():
        warnings.simplefilter("ignore")   # HIERARCH card warnings
        hp.write_map(str(tmp), maps if len(maps) > 1 else maps[0], nest=nest, dtype=[dtype] * len(maps)
                     if len(maps) > 1 else dtype, coord=coord, column_names=column_names,
                     column_units=list(units) if len(maps) > 1 else units[0], extra_header=cards,
                     overwrite=True)
    return path


# --------------------------------------------------------------------------- public: noise variance
def variance_factor(unit):
    """Factor to uK^2 of a variance unit (K_CMB^2, mK^2, uK^2, ...); None for no unit; KeyError if not a square."""
    if unit is None:
        return None
    u = str(unit).strip()
    key = u.replace(" ", "").replace("(", "").replace(")", "")
    if key.lower() in NO_UNIT:
        return None
    for sq in ("^2", "**2", "2"):
        if key.endswith(sq):
            f = normalise_unit(key[: -len(sq)])
            if f is None:
                raise KeyError(u)
            return f * f
    raise KeyError(u)


def load_noise_variance(path, field=0, per_hit_uk=None):
    """Per-pixel noise variance (uK^2, RING) from a HEALPix file, with its Nside and notes.

    Without ``per_hit_uk`` the column is a variance (TUNIT K_CMB^2, mK^2, uK^2 or
    none: uK^2 assumed).  With it the column holds hit counts and the variance is
    ``per_hit_uk**2 / hits``.  Pixels with no finite positive variance (or no hits)
    get variance 0 (no noise) and a note counts them.
    """
    p = Path(path)
    values, valid, info = _read_column(p, "noise variance", field)
    notes = list(info["notes"])
    bad = _bad_pixels(values)
    if valid is not None:
        bad |= ~valid
    if per_hit_uk is not None:
        hits = np.where(bad, 0.0, values)
        if np.any(hits < 0):
            raise _bad(p, f"negative hit count {float(hits.min()):g} in column {info['column']!r}",
                       "hit counts >= 0 (calibrate.noise_per_hit_uk given)")
        var = np.zeros_like(hits)
        seen = hits > 0
        var[seen] = float(per_hit_uk) ** 2 / hits[seen]
        what = f"hit counts x {per_hit_uk:g} uK per hit"
    else:
        unit = info["unit"]
        try:
            factor = variance_factor(unit)
        except KeyError:
            raise _bad(p, f"unit {str(unit).strip()!r} (TUNIT of column {info['column']!r}) is not a temperature "
                       "squared", "K_CMB^2, mK_CMB^2, uK^2 (or no unit: uK^2 assumed), or calibrate.noise_per_hit_uk "
                       "for hit counts")
        if factor is None:
            factor = 1.0
            notes.append(f"{p.name}: noise variance column {info['column']!r} has no unit; uK^2 assumed")
        if np.any(values[~bad] < 0):
            raise _bad(p, f"negative noise variance in column {info['column']!r}", "variances >= 0")
        var = np.where(bad, 0.0, values) * factor
        seen = var > 0
        what = f"variance column {info['column']!r}"
    if not np.any(seen):
        raise _bad(p, f"no pixel with a positive noise variance in column {info['column']!r}",
                   "a noise variance (or hit count) map with positive values")
    n0 = int(np.sum(~seen))
    if n0:
        notes.append(f"{p.name}: {n0} pixel(s) without variance or hits get no simulated noise")
    notes.append(f"{p.name}: per-pixel noise from {what}, Nside {info['nside']}, median rms "
                 f"{float(np.sqrt(np.median(var[seen]))):.4g} uK")
    return var, int(info["nside"]), notes


def regrid_variance(var, nside_out):
    """White-noise variance at another Nside: the pixel-area scaling var * (Nside_out / Nside_in)^2.

    Degrading averages k = (n_in/n_out)^2 sub-pixels, whose mean has variance
    mean(var)/k; upgrading splits a pixel into k sub-pixels of variance k var
    (healpy.ud_grade with power = 2).  Pixels of variance 0 stay without noise.
    """
    var = np.asarray(var, float)
    nside_in = hp.npix2nside(var.size)
    if nside_in == nside_out:
        return var
    v = np.where(var > 0, var, hp.UNSEEN)
    out = hp.ud_grade(v, int(nside_out), power=2, order_in="RING", order_out="RING")  # divides by (n_in/n_out)^2
    return np.where(np.isfinite(out) & (out != hp.UNSEEN) & (out > 0), out, 0.0)
