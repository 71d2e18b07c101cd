"""TOML text of a study mapping (the standard library reads TOML but does not write it).

Covers what study inputs contain: tables (nested to any depth), strings, booleans, integers,
floats (inf/nan included), arrays (of scalars, arrays or inline tables).  The result reads back
with :func:`tomllib.loads` to the same mapping (checked by :func:`dumps`).
"""

from __future__ import annotations

import json
import math
import tomllib
from typing import Any, Mapping

import numpy as np

__all__ = ["dumps"]


def _key(k: str) -> str:
    k = str(k)
    return k if k and all(c.isalnum() or c in "_-" for c in k) else json.dumps(k)


def _value(v: Any, where: str) -> str:
    if isinstance(v, (bool, np.bool_)):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        f = float(v)
        if math.isnan(f):
            return "nan"
        if math.isinf(f):
            return "inf" if f > 0 else "-inf"
        return repr(f)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)  # a JSON string is a valid TOML basic string
    if isinstance(v, Mapping):
        return "{" + ", ".join(f"{_key(k)} = {_value(x, f'{where}.{k}')}" for k, x in v.items()) + "}"
    if isinstance(v, (list, tuple, np.ndarray)):
        return "[" + ", ".join(_value(x, where) for x in (v.tolist() if isinstance(v, np.ndarray) else v)) + "]"
    raise ValueError(f"{where} = {v!r}: a {type(v).__name__} cannot be written as TOML; use a string, number, "
                     "boolean, list or table")


def _table(lines: list, prefix: str, table: Mapping[str, Any]) -> None:
    scalars = [(k, v) for k, v in table.items() if not isinstance(v, Mapping)]
    tables = [(k, v) for k, v in table.items() if isinstance(v, Mapping)]
    if prefix and (scalars or not tables):
        lines.append(f"[{prefix}]")
    for k, v in scalars:
        lines.append(f"{_key(k)} = {_value(v, f'{prefix}.{k}' if prefix else str(k))}")
    if scalars:
        lines.append("")
    for k, v in tables:
        _table(lines, f"{prefix}.{_key(k)}" if prefix else _key(k), v)


def dumps(data: Mapping[str, Any]) -> str:
    """TOML text of ``data`` (a mapping of section name → table); raises ValueError when a value has
    no TOML form or the text would not read back to ``data``."""
    if not isinstance(data, Mapping):
        raise ValueError(f"study input must be a mapping of sections, got {type(data).__name__}")
    lines: list = []
    _table(lines, "", data)
    text = "\n".join(lines).rstrip() + "\n"
    back = tomllib.loads(text)
    if json.dumps(back, sort_keys=True, default=str) != json.dumps(_plain(data), sort_keys=True, default=str):
        raise ValueError("study input: the mapping does not survive a TOML round trip (top-level keys must be tables)")
    return text


def _plain(v: Any) -> Any:
    if isinstance(v, Mapping):
        return {str(k): _plain(x) for k, x in v.items()}
    if isinstance(v, np.ndarray):
        return _plain(v.tolist())
    if isinstance(v, (list, tuple)):
        return [_plain(x) for x in v]
    if isinstance(v, np.generic):
        return v.item()
    return v
