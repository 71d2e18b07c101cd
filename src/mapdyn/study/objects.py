"""Stored objects without pickle (docs/architecture.md#file-formats): a restart state, normal
modes or a wavefunction guess becomes named arrays plus a JSON tree with a format version.

Encoding of the tree (``{"format": OBJECT_FORMAT, "root": node}``):

* None, bool, int, float, str → themselves (floats round-trip exactly through JSON's shortest
  repr; NaN/inf as the JSON extensions Python writes);
* ``numpy.ndarray`` → ``{"$a": name}`` and numpy scalars → ``{"$s": name}``: the bytes go to the
  dataset ``<prefix>.<name>`` unchanged (bit for bit);
* bytes → ``{"$b": name}`` (uint8 dataset); string/object arrays → ``{"$l": list, "dtype": ...}``;
* list → list; tuple → ``{"$t": [...]}``; dict → ``{"$d": [[key, value], ...]}``; complex →
  ``{"$z": [re, im]}``;
* a dataclass defined in a ``mapdyn`` module → ``{"$c": "module:Class", "f": {field: node}}``,
  rebuilt field by field without calling its constructor.

Reading never runs code from the file: only mapdyn dataclasses are rebuilt, by name.
"""

from __future__ import annotations

import dataclasses
import importlib
import json
from typing import Any

import numpy as np

__all__ = ["OBJECT_FORMAT", "ObjectFormatError", "encode_object", "decode_object"]

OBJECT_FORMAT = 1


class ObjectFormatError(ValueError):
    """A stored object cannot be decoded (unknown format version, unknown class, missing array)."""


def encode_object(obj: Any, prefix: str) -> dict[str, Any]:
    """Datasets for ``obj``: ``<prefix>.tree`` (JSON bytes) and ``<prefix>.<n>`` arrays."""
    arrays: dict[str, Any] = {}

    def enc(v: Any) -> Any:
        if isinstance(v, np.generic):  # before float: np.float64 is a float subclass, keep its type
            if v.dtype.kind in "US":
                return v.item()
            name = f"{prefix}.{len(arrays)}"
            arrays[name] = np.asarray(v)
            return {"$s": name}
        if v is None or isinstance(v, (bool, int, str, float)):
            return v
        if isinstance(v, (bytes, bytearray)):
            name = f"{prefix}.{len(arrays)}"
            arrays[name] = np.frombuffer(bytes(v), dtype=np.uint8)
            return {"$b": name}
        if isinstance(v, complex):
            return {"$z": [v.real, v.imag]}
        if isinstance(v, np.ndarray):
            if v.dtype == object or v.dtype.kind in "US":
                return {"$l": enc(v.tolist()), "dtype": v.dtype.str}
            name = f"{prefix}.{len(arrays)}"
            arrays[name] = v
            return {"$a": name}
        if isinstance(v, list):
            return [enc(x) for x in v]
        if isinstance(v, tuple):
            return {"$t": [enc(x) for x in v]}
        if isinstance(v, dict):
            return {"$d": [[enc(k), enc(x)] for k, x in v.items()]}
        if dataclasses.is_dataclass(v) and not isinstance(v, type):
            cls = type(v)
            if not cls.__module__.startswith("mapdyn."):
                raise TypeError(f"{prefix}: {cls.__module__}.{cls.__qualname__} is not a mapdyn class; cannot store it")
            return {"$c": f"{cls.__module__}:{cls.__qualname__}",
                    "f": {f.name: enc(getattr(v, f.name)) for f in dataclasses.fields(v)}}
        raise TypeError(f"{prefix}: cannot store a {type(v).__name__}")

    tree = json.dumps({"format": OBJECT_FORMAT, "root": enc(obj)}, allow_nan=True)
    arrays[f"{prefix}.tree"] = tree.encode()
    return arrays


def _class(name: str) -> type:
    module, _, qual = name.partition(":")
    if not module.startswith("mapdyn.") or not qual:
        raise ObjectFormatError(f"class {name!r} is not a mapdyn class")
    try:
        obj: Any = importlib.import_module(module)
        for part in qual.split("."):
            obj = getattr(obj, part)
    except (ImportError, AttributeError):
        raise ObjectFormatError(f"class {name!r} does not exist in this mapdyn version") from None
    if not (isinstance(obj, type) and dataclasses.is_dataclass(obj)):
        raise ObjectFormatError(f"{name!r} is not a stored-object class")
    return obj


def decode_object(arrays: dict[str, Any], prefix: str) -> Any:
    """The object stored by :func:`encode_object` under ``prefix`` (raises :class:`ObjectFormatError`)."""
    key = f"{prefix}.tree"
    if key not in arrays:
        raise ObjectFormatError(f"no stored object {prefix!r}")
    raw = arrays[key]
    try:
        tree = json.loads(raw.decode() if isinstance(raw, (bytes, bytearray)) else str(raw))
    except (ValueError, UnicodeDecodeError):
        raise ObjectFormatError(f"stored object {prefix!r}: its description is not JSON") from None
    if not isinstance(tree, dict) or tree.get("format") != OBJECT_FORMAT:
        got = tree.get("format") if isinstance(tree, dict) else None
        raise ObjectFormatError(f"stored object {prefix!r} has format {got!r}; this mapdyn reads format {OBJECT_FORMAT}")

    def dec(n: Any) -> Any:
        if isinstance(n, list):
            return [dec(x) for x in n]
        if not isinstance(n, dict):
            return n
        if "$l" in n:
            return np.array(dec(n["$l"]), dtype=np.dtype(n["dtype"]))
        if "$b" in n:
            if n["$b"] not in arrays:
                raise ObjectFormatError(f"stored object {prefix!r}: array {n['$b']!r} is missing")
            return np.asarray(arrays[n["$b"]]).tobytes()
        if "$a" in n or "$s" in n:
            name = n.get("$a", n.get("$s"))
            if name not in arrays:
                raise ObjectFormatError(f"stored object {prefix!r}: array {name!r} is missing")
            arr = np.asarray(arrays[name])
            return arr[()] if "$s" in n else arr
        if "$t" in n:
            return tuple(dec(x) for x in n["$t"])
        if "$d" in n:
            return {_hashable(dec(k)): dec(v) for k, v in n["$d"]}
        if "$z" in n:
            return complex(*n["$z"])
        if "$c" in n:
            cls = _class(n["$c"])
            obj: Any = object.__new__(cls)
            fields = dataclasses.fields(cls)
            names = {f.name for f in fields}
            # a field added later with a default may be missing from an older file: it gets its default
            later = {f.name: f for f in fields if f.name not in n["f"] and (
                f.default is not dataclasses.MISSING or f.default_factory is not dataclasses.MISSING)}
            if set(n["f"]) | set(later) != names:
                raise ObjectFormatError(f"stored object {prefix!r}: fields of {n['$c']} differ from this mapdyn version")
            for k, v in n["f"].items():
                object.__setattr__(obj, k, dec(v))
            for k, f in later.items():
                object.__setattr__(obj, k, f.default if f.default is not dataclasses.MISSING else f.default_factory())
            return obj
        raise ObjectFormatError(f"stored object {prefix!r}: unknown node {sorted(n)}")

    return dec(tree["root"])


def _hashable(k: Any) -> Any:
    return tuple(k) if isinstance(k, list) else k
