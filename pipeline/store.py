"""Unit stores: results of work units on disk in a format that cannot execute code.

Shard directories travel between people and machines, so nothing read back
from them may run code (no pickle).  One unit is one ``.npz`` file (numpy's
zip of ``.npy`` arrays), always read with ``allow_pickle=False``:

``__meta__``
    UTF-8 JSON (as a uint8 array): ``format`` (``"twinring-unit"``),
    ``version`` (:data:`VERSION`), the unit id, the work ``key``, the result's
    ``tree`` and ``sha256``, a checksum of everything else (the JSON without
    the checksum, then every array's dtype, shape and bytes).
``a0``, ``a1``, ...
    The numeric arrays of the result (object arrays are refused on write and
    on read).

The ``tree`` describes the result with tagged JSON nodes: ``None``, bool,
int (decimal text), float (``float.hex``, exact), complex, str, bytes, list,
tuple, dict (keys are nodes too), numpy arrays and numpy scalars (by array
index, dtype kept) and the dataclasses listed in :data:`DATACLASSES` (only
those: a name outside that table is a foreign file, never an import).  So a
result read back is equal, type for type and bit for bit, to the one written,
and resumed runs write byte-identical tables.

A damaged, foreign or tampered file is a :class:`StoreError` (an
:class:`~twinring.errors.InputError`) whose one-line message names the file.
JSON manifests of shard directories are read by :func:`read_json` with the
same one-line errors.
"""
from __future__ import annotations

import hashlib
import json
import math
import zipfile
from dataclasses import fields, is_dataclass
from pathlib import Path

import numpy as np

from .errors import InputError

FORMAT = "twinring-unit"
VERSION = 2              # 1 was a pickle (never read any more)
SUFFIX = ".npz"
META = "__meta__"

#: dataclasses a unit result may contain: qualified name -> (module, attribute). Nothing else is imported.
DATACLASSES = {
    "twinring.search.ChunkResult": ("twinring.search", "ChunkResult"),
}


class StoreError(InputError):
    """A unit file that cannot be used.  ``stale`` is True when the file is sound but belongs to other work."""

    def __init__(self, msg, stale=False, reason=None):
        super().__init__(msg)
        self.stale = stale
        self.reason = reason or msg      # the message without what is allowed (for resume's log line)


# --------------------------------------------------------------------------- encoding
def _qualname(obj) -> str:
    cls = type(obj)
    return f"{cls.__module__}.{cls.__qualname__}"


def encode(obj, arrays: list):
    """The tagged JSON tree of ``obj``; numpy arrays are appended to ``arrays``."""
    if obj is None:
        return {"t": "none"}
    if isinstance(obj, np.generic):          # before float: numpy's float64 is a float subclass
        if obj.dtype.hasobject:
            raise TypeError("unit store: cannot store a numpy object scalar")
        arrays.append(np.asarray(obj))
        return {"t": "scalar", "a": len(arrays) - 1}
    if isinstance(obj, bool):
        return {"t": "bool", "v": obj}
    if isinstance(obj, int):
        return {"t": "int", "v": str(int(obj))}
    if isinstance(obj, float):
        return {"t": "float", "v": float(obj).hex()}
    if isinstance(obj, complex):
        return {"t": "complex", "v": [obj.real.hex(), obj.imag.hex()]}
    if isinstance(obj, str):
        return {"t": "str", "v": obj}
    if isinstance(obj, bytes):
        return {"t": "bytes", "v": obj.hex()}
    if isinstance(obj, np.ndarray):
        if type(obj) is not np.ndarray or obj.dtype.hasobject:
            raise TypeError(f"unit store: cannot store a {type(obj).__name__} of dtype {obj.dtype}")
        arrays.append(obj)
        return {"t": "array", "a": len(arrays) - 1}
    if isinstance(obj, tuple) and not hasattr(obj, "_fields"):
        return {"t": "tuple", "v": [encode(x, arrays) for x in obj]}
    if isinstance(obj, list):
        return {"t": "list", "v": [encode(x, arrays) for x in obj]}
    if isinstance(obj, dict):
        return {"t": "dict", "k": [encode(k, arrays) for k in obj], "v": [encode(v, arrays) for v in obj.values()]}
    if is_dataclass(obj) and not isinstance(obj, type):
        name = _qualname(obj)
        if name not in DATACLASSES:
            raise TypeError(f"unit store: {name} is not in twinring.store.DATACLASSES")
        return {"t": "dataclass", "c": name, "f": {f.name: encode(getattr(obj, f.name), arrays) for f in fields(obj)}}
    raise TypeError(f"unit store: cannot store a {type(obj).__name__}")


class _Bad(Exception):
    """A tree that is not one we write (foreign or tampered)."""


def _resolve(name):
    import importlib

    try:
        mod, attr = DATACLASSES[name]
    except (KeyError, TypeError):
        raise _Bad(f"names class {str(name)[:60]!r}, which is not a unit result type")
    return getattr(importlib.import_module(mod), attr)


def decode(node, arrays: list):
    """The object of a tagged tree (inverse of :func:`encode`); ``_Bad`` on anything else."""
    if not isinstance(node, dict):
        raise _Bad("tree node is not a mapping")
    t = node.get("t")
    v = node.get("v")
    try:
        if t == "none":
            return None
        if t == "bool" and isinstance(v, bool):
            return v
        if t == "int" and isinstance(v, str):
            return int(v)
        if t == "float" and isinstance(v, str):
            return float.fromhex(v)
        if t == "complex" and isinstance(v, list) and len(v) == 2:
            return complex(float.fromhex(v[0]), float.fromhex(v[1]))
        if t == "str" and isinstance(v, str):
            return v
        if t == "bytes" and isinstance(v, str):
            return bytes.fromhex(v)
        if t in ("array", "scalar"):
            a = node.get("a")
            if not isinstance(a, int) or isinstance(a, bool) or not 0 <= a < len(arrays):
                raise _Bad(f"array index {a!r} out of range")
            arr = arrays[a]
            if t == "scalar":
                if arr.ndim != 0:
                    raise _Bad("scalar node points at an array")
                return arr[()]
            return arr
        if t in ("tuple", "list") and isinstance(v, list):
            items = [decode(x, arrays) for x in v]
            return tuple(items) if t == "tuple" else items
        if t == "dict":
            k = node.get("k")
            if not (isinstance(k, list) and isinstance(v, list) and len(k) == len(v)):
                raise _Bad("dict node without matching keys and values")
            return {decode(a, arrays): decode(b, arrays) for a, b in zip(k, v)}
        if t == "dataclass":
            cls = _resolve(node.get("c"))
            f = node.get("f")
            names = [x.name for x in fields(cls)]
            if not isinstance(f, dict) or sorted(f) != sorted(names):
                raise _Bad(f"fields of {node.get('c')} differ")
            obj = cls.__new__(cls)
            for name in names:
                object.__setattr__(obj, name, decode(f[name], arrays))
            return obj
    except (ValueError, TypeError, OverflowError) as exc:
        raise _Bad(f"bad {t} node ({exc.__class__.__name__})")
    raise _Bad(f"unknown node {str(t)[:30]!r}")


def _checksum(meta: dict, arrays) -> str:
    h = hashlib.sha256()
    body = {k: v for k, v in meta.items() if k != "sha256"}
    h.update(json.dumps(body, sort_keys=True, separators=(",", ":")).encode())
    for a in arrays:
        a = np.ascontiguousarray(a)
        h.update(f"|{a.dtype.str}{a.shape}|".encode())
        h.update(a.tobytes())
    return h.hexdigest()


# --------------------------------------------------------------------------- files
def write_unit(path, unit, key, result) -> Path:
    """Write one unit's result atomically (``.npz``, see the module notes)."""
    from .results import atomic_path

    path = Path(path)
    arrays: list = []
    tree = encode(result, arrays)
    ids: list = []
    meta = {"format": FORMAT, "version": VERSION, "unit": encode(unit, ids), "key": encode(key, ids),
            "tree": tree, "arrays": len(arrays)}
    if ids:
        raise TypeError("unit store: unit ids and keys must be plain values (ints, strings, tuples of them)")
    meta["sha256"] = _checksum(meta, arrays)
    blob = np.frombuffer(json.dumps(meta, sort_keys=True).encode(), dtype=np.uint8)
    with atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            np.savez(fh, **{META: blob}, **{f"a{i}": a for i, a in enumerate(arrays)})
    return path


def _kind_of(head: bytes) -> str:
    if head[:1] == b"\x80":
        return "a Python pickle, which twinring never loads"
    if head[:6] == b"\x93NUMPY":
        return "a bare .npy array"
    if not head:
        return "an empty file"
    return "not a zip archive"


def read_unit(path, unit=None, key=None):
    """``(unit, key, result)`` of a unit file, checked; :class:`StoreError` naming the file otherwise.

    With ``unit`` (and ``key``), a file of another unit (or work key) is a
    StoreError too (``stale=True`` for another key: a sound file of other work).
    """
    path = Path(path)
    allowed = f"allowed: a {SUFFIX} unit file written by twinring (store version {VERSION}); rerun to remake it"

    def bad(what):
        return StoreError(f"{path}: {what}; {allowed}", reason=f"{path}: {what}")

    try:
        with open(path, "rb") as fh:
            head = fh.read(8)
    except OSError as exc:
        raise bad(f"unreadable unit file ({exc.strerror or exc.__class__.__name__})")
    if head[:4] != b"PK\x03\x04":
        raise bad(f"not a unit store ({_kind_of(head)})")
    try:
        with np.load(path, allow_pickle=False) as npz:
            names = set(npz.files)
            if META not in names:
                raise bad("foreign .npz file (no twinring metadata)")
            raw = npz[META]
            if raw.dtype != np.uint8 or raw.ndim != 1:
                raise bad("foreign .npz file (metadata of another kind)")
            try:
                meta = json.loads(raw.tobytes().decode("utf-8"))
            except (UnicodeDecodeError, ValueError):
                raise bad("damaged unit file (metadata is not JSON)")
            if not isinstance(meta, dict) or meta.get("format") != FORMAT:
                raise bad("foreign .npz file (not a twinring unit)")
            if meta.get("version") != VERSION:
                raise bad(f"unit store version {meta.get('version')!r} (this twinring reads {VERSION})")
            n = meta.get("arrays")
            if not isinstance(n, int) or isinstance(n, bool) or names != {META} | {f"a{i}" for i in range(n)}:
                raise bad("damaged or tampered unit file (its arrays differ from its metadata)")
            arrays = [npz[f"a{i}"] for i in range(n)]
    except StoreError:
        raise
    except (ValueError, OSError, EOFError, KeyError, zipfile.BadZipFile, zipfile.LargeZipFile) as exc:
        text = str(exc).splitlines()[0][:80] if str(exc) else ""
        raise bad(f"damaged unit file ({exc.__class__.__name__}{': ' + text if text else ''})")
    if meta.get("sha256") != _checksum(meta, arrays):
        raise bad("damaged or tampered unit file (checksum differs)")
    try:
        got_unit = decode(meta.get("unit"), [])
        got_key = decode(meta.get("key"), [])
        result = decode(meta.get("tree"), arrays)
    except _Bad as exc:
        raise bad(f"foreign or tampered unit file ({exc})")
    if unit is not None and got_unit != unit:
        raise bad(f"holds unit {got_unit!r}, expected {unit!r}")
    if key is not None and got_key != key:
        why = f"{path}: made by other work (key {got_key!r}, expected {key!r})"
        raise StoreError(f"{why}; allowed: units of the same work (same config and inputs)", stale=True, reason=why)
    return got_unit, got_key, result


def read_json(path, what, allowed, need=()):
    """A JSON manifest (a mapping with the keys ``need``); a one-line InputError naming the file otherwise."""
    p = Path(path)
    try:
        text = p.read_text()
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{p}: unreadable {what} ({exc.__class__.__name__}); allowed: {allowed}")
    try:
        data = json.loads(text, parse_constant=lambda c: math.nan)
    except ValueError as exc:
        raise InputError(f"{p}: {what} is not valid JSON ({exc.__class__.__name__} at line "
                         f"{getattr(exc, 'lineno', '?')}); allowed: {allowed}")
    if not isinstance(data, dict):
        raise InputError(f"{p}: {what} holds a {type(data).__name__}, not a mapping; allowed: {allowed}")
    missing = [k for k in need if k not in data]
    if missing:
        raise InputError(f"{p}: {what} lacks {', '.join(missing)}; allowed: {allowed}")
    return data


# --------------------------------------------------------------------------- shard directories
def _unit_id(u):
    """A unit id from JSON: a non-negative int or a list of them (as a tuple); ValueError otherwise."""
    if isinstance(u, int) and not isinstance(u, bool) and u >= 0:
        return u
    if isinstance(u, list) and u and all(isinstance(x, int) and not isinstance(x, bool) and x >= 0 for x in u):
        return tuple(u)
    raise ValueError(f"unit id {str(u)[:40]}")


def read_shard_json(p, what, allowed, need, units_keys=("units",)):
    """A shard manifest checked for shape: ``shard`` [K, N] with 0 <= K < N, unit lists; one-line errors."""
    data = read_json(p, what, allowed, need)
    try:
        k, n = data["shard"]
        if not all(isinstance(x, int) and not isinstance(x, bool) for x in (k, n)) or not 0 <= k < n:
            raise ValueError(f"shard {k}/{n}")
        data["shard"] = (int(k), int(n))
        for name in units_keys:
            if not isinstance(data[name], list):
                raise ValueError(f"{name} is not a list")
            data[name] = [_unit_id(u) for u in data[name]]
    except (ValueError, TypeError) as exc:
        raise InputError(f"{p}: {what} damaged ({exc.__class__.__name__}: {str(exc)[:60]}); allowed: {allowed}")
    return data


def refuse_out_among_inputs(out, dirs, what="shard"):
    """A one-line InputError when ``out`` is (resolves to) one of the input directories ``dirs``."""
    if out is None:
        return
    o = Path(out).expanduser().resolve()
    for d in dirs:
        if Path(d).expanduser().resolve() == o:
            raise InputError(f"--out {out}: is one of the {what} directories being merged ({d}); "
                             f"allowed: a directory that is not an input of the merge")
