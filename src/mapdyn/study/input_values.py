"""Reading values of a study input: the one-line :class:`ConfigError`, numbers with units in
strings (converted with :mod:`mapdyn.units`), and typed access to one TOML table."""

from __future__ import annotations

import difflib
import math
import re
from typing import Any, Mapping

from mapdyn.units import (
    AU_TIME_IN_FS,
    BOHR_IN_ANGSTROM,
    ENERGY_UNITS_IN_EV,
    HARTREE_IN_EV,
    LENGTH_UNITS_IN_ANGSTROM,
    TIME_UNITS_IN_FS,
    UNIT_ALIASES,
)


class ConfigError(ValueError):
    """Invalid study input; ``key`` is the dotted key at fault (or the file), the message one line."""

    def __init__(self, key: str, message: str):
        self.key = key
        self.message = message
        if message.startswith(("=", "is ", "section ", "applies ", "needs ", "gives ")):
            text = f"{key} {message}"
        elif message.startswith((" ", ":")):
            text = f"{key}{message}"
        else:
            text = f"{key}: {message}"
        super().__init__(text)

    def __reduce__(self):
        return (type(self), (self.key, self.message))


def did_you_mean(word: str, allowed) -> str:
    hint = difflib.get_close_matches(word, list(allowed), n=1, cutoff=0.6)
    return f" (did you mean '{hint[0]}'?)" if hint else ""


def show_value(value: Any) -> str:
    text = repr(value) if not isinstance(value, str) else f'"{value}"'
    return text if len(text) <= 60 else text[:57] + "..."


def number_with_unit(text: Any, key: str, what: str, example: str, unit_pattern: str) -> tuple[float, str]:
    """Split "<number> <unit>" → (value, unit as written); one-line ConfigError naming ``key`` otherwise."""
    if isinstance(text, bool) or not isinstance(text, str):
        raise ConfigError(key, f"= {show_value(text)}: give {what} with a unit as a string, e.g. {example}")
    m = re.fullmatch(r"\s*([-+0-9.eE]+)\s*(" + unit_pattern + r")\s*", text)
    if not m:
        raise ConfigError(key, f"= {show_value(text)}: cannot read {what}; write a number and a unit, e.g. {example}")
    try:
        return float(m.group(1)), m.group(2)
    except ValueError:
        raise ConfigError(key, f"= {show_value(text)}: {m.group(1)!r} is not a number") from None


_NUMBER_AND_UNIT = re.compile(r"\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(\S.*?)?\s*")
_KINDS = {
    "energy": (ENERGY_UNITS_IN_EV, "Eh, eV, meV, kcal/mol, kJ/mol, cm-1", '"0.03 eV" or "5 kcal/mol"'),
    "time": (TIME_UNITS_IN_FS, "au, as, fs, ps", '"0.5 fs" or "20 au"'),
    "length": (LENGTH_UNITS_IN_ANGSTROM, "bohr, Å (or angstrom), nm", '"-8 bohr" or "1.2 Å"'),
    "temperature": ({"K": 1.0}, "K", '"300 K"'),
    "momentum": ({"au": 1.0}, "au (m_e bohr / a.u. time)", '"15 au"'),
}


def parse_quantity(text: Any, key: str, kind: str) -> float:
    """A number with a unit → Hartree atomic units (Eh, a.u. of time, bohr) or K.

    ``kind`` energy: Eh, eV, meV, kcal/mol, kJ/mol, cm-1; time: au, as, fs, ps; length: bohr, Å,
    nm; temperature: K; momentum: au.  Factors from :mod:`ase.units` (via :mod:`mapdyn.units`).  One-line
    :class:`ConfigError` naming ``key`` for a missing or unknown unit.
    """
    table, allowed, example = _KINDS[kind]
    noun = {"time": "a duration", "energy": "an energy"}.get(kind, f"a {kind}")
    if isinstance(text, bool) or not isinstance(text, str):
        raise ConfigError(key, f"= {show_value(text)}: give {noun} with a unit as a string, e.g. {example} ({allowed})")
    m = _NUMBER_AND_UNIT.fullmatch(text)
    if not m or m.group(2) is None:
        raise ConfigError(key, f"= {show_value(text)}: cannot read {noun}; write a number and a unit, e.g. {example}")
    value, written = float(m.group(1)), m.group(2)
    unit = UNIT_ALIASES.get(written.lower().replace(" ", ""))
    if unit not in table:
        raise ConfigError(key, f"= {show_value(text)}: unknown {kind} unit {written!r}; use {allowed}"
                          f"{did_you_mean(written, list(table))}")
    size = table[unit]
    if kind == "energy":
        return value * size / HARTREE_IN_EV
    if kind == "time":
        return value * size / AU_TIME_IN_FS
    if kind == "length":
        return value * size / BOHR_IN_ANGSTROM
    return value * size


def parse_duration(text: Any, key: str = "duration") -> float:
    """A duration string ("0.5 fs", "500 as", "0.1 ps", "20 au") → atomic units of time (> 0)."""
    au = parse_quantity(text, key, "time")
    if not math.isfinite(au) or au <= 0:
        raise ConfigError(key, f"= {show_value(text)}: must be a positive duration, e.g. \"0.5 fs\"")
    return float(au)


def parse_energy(text: Any, key: str) -> float:
    """A positive energy string ("1e-3 Eh", "3 meV", "0.5 kcal/mol", "20 cm-1", …) → Eh."""
    eh = parse_quantity(text, key, "energy")
    if not math.isfinite(eh) or eh <= 0:
        raise ConfigError(key, f"= {show_value(text)}: must be a positive energy, e.g. \"1e-3 Eh\"")
    return float(eh)


def format_quantity(value: float, unit: str, digits: int = 4) -> str:
    """A value rounded to ``digits`` significant digits with its unit ("20.67 au")."""
    return f"{float(value):.{digits}g} {unit}"


class Section:
    """Reads keys of one TOML table, remembering which were used; ``finish`` refuses the rest."""

    def __init__(self, name: str, table: Any, allowed: tuple[str, ...], elsewhere: Mapping[str, str] | None = None):
        if not isinstance(table, Mapping):
            raise ConfigError(name, f"must be a table ([{name}]), got {show_value(table)}")
        self.name, self.table, self.allowed = name, dict(table), allowed
        self.elsewhere = dict(elsewhere or {})
        for key in self.table:
            if key not in allowed:
                if key in self.elsewhere:
                    raise ConfigError(f"{name}.{key}", f"is not used {self.elsewhere[key]}")
                raise ConfigError(f"{name}.{key}", f" is not a known key{did_you_mean(key, allowed)}; allowed: {', '.join(allowed)}")

    def key(self, k: str) -> str:
        return f"{self.name}.{k}"

    def has(self, k: str) -> bool:
        return k in self.table

    def raw(self, k: str, default: Any = None) -> Any:
        return self.table.get(k, default)

    def required(self, k: str, what: str) -> Any:
        if k not in self.table:
            raise ConfigError(self.key(k), f"is missing; give {what}")
        return self.table[k]

    def string(self, k: str, default: str | None = None, required: bool = False, what: str = "a string") -> str | None:
        if required:
            v = self.required(k, what)
        else:
            v = self.table.get(k, default)
        if v is not None and (not isinstance(v, str) or not v.strip()):
            raise ConfigError(self.key(k), f"= {show_value(v)}: must be {what}")
        return v

    def choice(self, k: str, allowed, default: str | None = None, required: bool = False) -> str | None:
        v = self.required(k, "one of " + ", ".join(allowed)) if required else self.table.get(k, default)
        if v is None:
            return None
        if not isinstance(v, str) or v not in allowed:
            raise ConfigError(self.key(k), f"= {show_value(v)}: choose one of {', '.join(allowed)}{did_you_mean(str(v), allowed)}")
        return v

    def integer(self, k: str, default: int | None = None, minimum: int | None = None, required: bool = False,
                what: str = "an integer") -> int | None:
        v = self.required(k, what) if required else self.table.get(k, default)
        if v is None:
            return None
        if isinstance(v, bool) or not isinstance(v, int):
            raise ConfigError(self.key(k), f"= {show_value(v)}: must be {what}")
        if minimum is not None and v < minimum:
            raise ConfigError(self.key(k), f"= {v}: must be {what} (>= {minimum})")
        return int(v)

    def number(self, k: str, default: float | None = None, required: bool = False, what: str = "a number") -> float | None:
        v = self.required(k, what) if required else self.table.get(k, default)
        if v is None:
            return None
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise ConfigError(self.key(k), f"= {show_value(v)}: must be {what}")
        return float(v)

    def boolean(self, k: str, default: bool) -> bool:
        v = self.table.get(k, default)
        if not isinstance(v, bool):
            raise ConfigError(self.key(k), f"= {show_value(v)}: must be true or false")
        return v
