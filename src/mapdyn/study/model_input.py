"""Harmonic-bath models in the study file: ``electronic.model = "vibronic"`` or ``"spin_boson"``.

The ``[electronic.parameters]`` table of these models carries units in strings (read with
:func:`mapdyn.study.input_values.parse_quantity`); the parsed values are kept in atomic units
(Eh) in ``ElectronicConfig.model_parameters`` and turned into a model by :func:`bath_model`.

vibronic (linear vibronic coupling in dimensionless coordinates,
:meth:`mapdyn.models.vibronic.LinearVibronicModel.from_dimensionless`)::

    energies        = ["0 eV", "0.3 eV"]                  diabatic energies E_k (F entries)
    frequencies     = ["1000 cm-1", "2000 cm-1"]          ħω_j (D entries, > 0)
    kappa           = [["0 eV", "0 eV"], ["-0.1 eV", "0.05 eV"]]   κ_j^(k): F rows of D entries
    mode_couplings  = [[0, 1, 0, "0.02 eV"]]              λ_j^(kl): [state k, state l, mode j, value]
    state_couplings = [[0, 1, "0.01 eV"]]                 constant A_kl: [state k, state l, value]

spin_boson (:class:`mapdyn.models.spin_boson.SpinBoson`, H = ε σ_z + Δ σ_x + bath)::

    epsilon = "0 eV", delta = "10 meV", spectral_density = "debye" | "ohmic", modes = 60,
    cutoff = "200 cm-1", and reorganization = "<energy>" (debye) or kondo = <number> (ohmic)
"""

from __future__ import annotations

import math
from typing import Any, Mapping

import numpy as np

from mapdyn.study.input_values import ConfigError, did_you_mean, parse_quantity, show_value

__all__ = ["BATH_MODELS", "parse_bath_model", "bath_model"]

#: model names whose diabatic Hamiltonian is linear in harmonic coordinates (thermal bath sampling)
BATH_MODELS = ("vibronic", "spin_boson")

_KEYS = {
    "vibronic": ("energies", "frequencies", "kappa", "mode_couplings", "state_couplings"),
    "spin_boson": ("epsilon", "delta", "spectral_density", "modes", "cutoff", "reorganization", "kondo"),
}
_PREFIX = "electronic.parameters."


def _energies(value: Any, key: str, length: int | None = None) -> list[float]:
    if not isinstance(value, list) or not value:
        raise ConfigError(key, f"= {show_value(value)}: must be a list of energies with units, e.g. [\"0 eV\", \"0.3 eV\"]")
    if length is not None and len(value) != length:
        raise ConfigError(key, f"= {show_value(value)}: needs {length} entries, got {len(value)}")
    return [parse_quantity(v, key, "energy") for v in value]


def _index(value: Any, key: str, what: str, n: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not 0 <= value < n:
        raise ConfigError(key, f"= {show_value(value)}: {what} must be an integer 0..{n - 1}")
    return int(value)


def _parse_vibronic(params: Mapping[str, Any]) -> tuple[dict, int]:
    for k in ("energies", "frequencies", "kappa"):
        if k not in params:
            raise ConfigError(_PREFIX + k, "is missing; the vibronic model needs energies, frequencies and kappa")
    E = _energies(params["energies"], _PREFIX + "energies")
    F = len(E)
    if F < 2:
        raise ConfigError(_PREFIX + "energies", f"= {show_value(params['energies'])}: give at least 2 states")
    w = _energies(params["frequencies"], _PREFIX + "frequencies")
    D = len(w)
    if any(x <= 0 for x in w):
        raise ConfigError(_PREFIX + "frequencies", f"= {show_value(params['frequencies'])}: must all be positive")
    kap_raw = params["kappa"]
    if not isinstance(kap_raw, list) or len(kap_raw) != F:
        raise ConfigError(_PREFIX + "kappa", f"= {show_value(kap_raw)}: give {F} rows (one per state) of {D} energies")
    kappa = [_energies(row, _PREFIX + "kappa", D) for row in kap_raw]
    lam = np.zeros((D, F, F))
    for entry in params.get("mode_couplings", []):
        key = _PREFIX + "mode_couplings"
        if not isinstance(entry, list) or len(entry) != 4:
            raise ConfigError(key, f"entry {show_value(entry)}: must be [state k, state l, mode j, \"<energy>\"]")
        k, l_ = _index(entry[0], key, "state k", F), _index(entry[1], key, "state l", F)
        j = _index(entry[2], key, "mode j", D)
        if k == l_:
            raise ConfigError(key, f"entry {show_value(entry)}: couples a state to itself (use kappa)")
        lam[j, k, l_] = lam[j, l_, k] = parse_quantity(entry[3], key, "energy")
    A = np.diag(E)
    for entry in params.get("state_couplings", []):
        key = _PREFIX + "state_couplings"
        if not isinstance(entry, list) or len(entry) != 3:
            raise ConfigError(key, f"entry {show_value(entry)}: must be [state k, state l, \"<energy>\"]")
        k, l_ = _index(entry[0], key, "state k", F), _index(entry[1], key, "state l", F)
        if k == l_:
            raise ConfigError(key, f"entry {show_value(entry)}: couples a state to itself (use energies)")
        A[k, l_] = A[l_, k] = parse_quantity(entry[2], key, "energy")
    return {"constant": A.tolist(), "frequencies": w, "kappa": kappa, "lam": lam.tolist()}, F


def _parse_spin_boson(params: Mapping[str, Any]) -> tuple[dict, int]:
    shape = params.get("spectral_density", "debye")
    if shape not in ("debye", "ohmic"):
        raise ConfigError(_PREFIX + "spectral_density", f"= {show_value(shape)}: allowed \"debye\", \"ohmic\"")
    if "delta" not in params:
        raise ConfigError(_PREFIX + "delta", "is missing; give the tunnelling coupling Δ with a unit, e.g. \"10 meV\"")
    if "cutoff" not in params:
        raise ConfigError(_PREFIX + "cutoff", "is missing; give the bath cutoff frequency ħω_c, e.g. \"200 cm-1\"")
    out: dict = {"spectral_density": shape,
                 "epsilon": parse_quantity(params.get("epsilon", "0 Eh"), _PREFIX + "epsilon", "energy"),
                 "delta": parse_quantity(params["delta"], _PREFIX + "delta", "energy"),
                 "cutoff": parse_quantity(params["cutoff"], _PREFIX + "cutoff", "energy")}
    if not out["cutoff"] > 0:
        raise ConfigError(_PREFIX + "cutoff", f"= {show_value(params['cutoff'])}: must be positive")
    modes = params.get("modes", 100)
    if isinstance(modes, bool) or not isinstance(modes, int) or not 1 <= modes <= 10000:
        raise ConfigError(_PREFIX + "modes", f"= {show_value(modes)}: must be a number of bath modes 1..10000")
    out["modes"] = int(modes)
    own, other = ("reorganization", "kondo") if shape == "debye" else ("kondo", "reorganization")
    if other in params:
        raise ConfigError(_PREFIX + other, f"is not used with spectral_density = \"{shape}\" (give {own})")
    if own not in params:
        example = "\"50 cm-1\"" if own == "reorganization" else "0.1"
        raise ConfigError(_PREFIX + own, f"is missing; spectral_density = \"{shape}\" needs it, e.g. {example}")
    if own == "reorganization":
        out[own] = parse_quantity(params[own], _PREFIX + own, "energy")
    else:
        v = params[own]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise ConfigError(_PREFIX + own, f"= {show_value(v)}: must be a dimensionless number (the Kondo parameter ξ)")
        out[own] = float(v)
    if not out[own] > 0:
        raise ConfigError(_PREFIX + own, f"= {show_value(params[own])}: must be positive")
    return out, 2


def parse_bath_model(name: str, params: Any) -> tuple[dict, int]:
    """``electronic.parameters`` of model ``name`` → (parameters in Eh, number of states F).
    One-line :class:`ConfigError` naming the key for an unknown key or a wrong value."""
    if not isinstance(params, Mapping):
        raise ConfigError("electronic.parameters", f"must be a table of {name} parameters")
    allowed = _KEYS[name]
    for k in params:
        if k not in allowed:
            raise ConfigError(_PREFIX + k, f" is not a parameter of {name}{did_you_mean(k, allowed)}; "
                              f"allowed: {', '.join(allowed)}")
    parsed, F = _parse_vibronic(params) if name == "vibronic" else _parse_spin_boson(params)
    try:
        bath_model(name, parsed)
    except ValueError as err:
        raise ConfigError("electronic.parameters", str(err).splitlines()[0]) from None
    return parsed, F


def bath_model(name: str, parameters: Mapping[str, Any]):
    """The model object from parameters in atomic units (as returned by :func:`parse_bath_model`)."""
    from mapdyn.models.spin_boson import SpinBoson
    from mapdyn.models.vibronic import LinearVibronicModel

    p = parameters
    if name == "vibronic":
        return LinearVibronicModel.from_dimensionless(np.array(p["constant"]), np.array(p["frequencies"]),
                                                      np.array(p["kappa"]), np.array(p["lam"]))
    if name == "spin_boson":
        if p["spectral_density"] == "debye":
            return SpinBoson.debye(p["epsilon"], p["delta"], p["reorganization"], p["cutoff"], p["modes"])
        return SpinBoson.ohmic(p["epsilon"], p["delta"], p["kondo"], p["cutoff"], p["modes"])
    raise ValueError(f"{name!r} is not a harmonic-bath model; allowed: {', '.join(BATH_MODELS)}")
