"""A backend from a user Python function (e.g. a wrapper around an external program).

Atomic units throughout: positions in Bohr, energies in Eh, gradients in Eh/Bohr, couplings in
1/Bohr, dipoles in e·Bohr.

The user function is called as ``function(positions_bohr, need_gradients=..., previous=...)``
(keywords it does not accept are not passed) and returns a mapping with

=====================  ==============  =====================================================
key                    shape           meaning
=====================  ==============  =====================================================
``energies``           (F,)            adiabatic energies, ascending (required), Eh
``gradients``          (F, N, 3)       dE_k/dR, Eh/Bohr (required when need_gradients)
``couplings``          (F, F, N, 3)    d_kl = <psi_k|grad psi_l>, 1/Bohr (optional)
``state_vectors``      (M, F)          columns = the states in a fixed orthonormal basis; the
                                       backend forms the overlaps with the previous step
                                       (optional)
``overlap_raw``        (F, F)          <psi_k(previous)|psi_l(this)> in the function's own
                                       (unaligned) phases (optional, needs ``previous``)
``state_data``         any             whatever the function wants back as ``previous`` on the
                                       next call (optional; e.g. CI vectors of an external code)
``transition_dipoles`` (F, F, 3)       optional
=====================  ==============  =====================================================

The backend keeps the contract of :mod:`mapdyn.backends.contract`: the phases of the new states are
aligned to the previous step (:func:`match_states` on the raw overlap), the same signs are applied
to couplings and dipoles, and everything carried between steps travels in the returned ``guess``,
so ``compute`` is a pure function of its arguments as long as the user function is.  A function
that supplies neither couplings nor overlaps cannot drive nonadiabatic dynamics; the driver
refuses it on its first step.
"""

from __future__ import annotations

import dataclasses
import inspect
import time
from typing import Any, Callable, Mapping

import numpy as np

from mapdyn.backends.contract import (
    LOW_OVERLAP_THRESHOLD,
    BackendError,
    ElectronicResult,
    apply_state_signs,
    match_states,
)

__all__ = ["CallbackBackend", "CallbackGuess"]

_KEYS = ("energies", "gradients", "couplings", "state_vectors", "overlap_raw", "state_data", "transition_dipoles")


@dataclasses.dataclass(frozen=True)
class CallbackGuess:
    """Carried between calls: previous positions (N, 3) Bohr, the aligned state vectors (or None),
    the signs applied to the function's raw states (F,), and the function's ``state_data``."""

    positions_bohr: np.ndarray
    state_vectors: np.ndarray | None
    signs: np.ndarray
    state_data: Any = None


class CallbackBackend:
    """Electronic backend wrapping ``function`` (see the module docstring for its return mapping).

    Parameters
    ----------
    function : callable(positions_bohr (N, 3), need_gradients=bool, previous=state_data or None).
    nstates : number of states F the function returns.
    natoms : number of atoms N (positions are checked against it).
    low_overlap_threshold : min |S| below which a step is flagged as low-overlap.
    """

    def __init__(self, function: Callable[..., Mapping[str, Any]], nstates: int, natoms: int,
                 low_overlap_threshold: float = LOW_OVERLAP_THRESHOLD):
        if not callable(function):
            raise ValueError("function must be callable: positions_bohr (N, 3) -> mapping with 'energies', 'gradients', ...")
        if isinstance(nstates, bool) or not isinstance(nstates, (int, np.integer)) or nstates < 1:
            raise ValueError(f"nstates={nstates!r} is not allowed; it must be a positive integer")
        if isinstance(natoms, bool) or not isinstance(natoms, (int, np.integer)) or natoms < 1:
            raise ValueError(f"natoms={natoms!r} is not allowed; it must be a positive integer")
        self.function = function
        self.nstates = int(nstates)
        self.natoms = int(natoms)
        self.low_overlap_threshold = float(low_overlap_threshold)
        try:
            params = inspect.signature(function).parameters
            var_kw = any(p.kind is inspect.Parameter.VAR_KEYWORD for p in params.values())
            self._accepts = {k for k in ("need_gradients", "previous") if var_kw or k in params}
        except (TypeError, ValueError):
            self._accepts = {"need_gradients", "previous"}

    def _call(self, pos: np.ndarray, need_gradients: bool, previous: Any) -> Mapping[str, Any]:
        kwargs = {}
        if "need_gradients" in self._accepts:
            kwargs["need_gradients"] = need_gradients
        if "previous" in self._accepts:
            kwargs["previous"] = previous
        try:
            out = self.function(pos.copy(), **kwargs)
        except BackendError:
            raise
        except Exception as exc:  # the user's code failed: report it as a backend failure
            raise BackendError(f"user function raised {type(exc).__name__}: {exc}",
                               [{"what": "callback", "outcome": repr(exc)}]) from exc
        if not isinstance(out, Mapping):
            raise ValueError(f"the user function must return a mapping with keys {', '.join(_KEYS)}; got {type(out).__name__}")
        unknown = set(out) - set(_KEYS)
        if unknown:
            raise ValueError(f"the user function returned unknown key(s) {sorted(unknown)}; allowed: {', '.join(_KEYS)}")
        return out

    def compute(self, positions_bohr: np.ndarray, guess: CallbackGuess | None = None,
                need_gradients: bool = True) -> ElectronicResult:
        """Call the function at ``positions_bohr`` (N, 3) Bohr and return an aligned ElectronicResult."""
        t0 = time.perf_counter()
        pos = np.asarray(positions_bohr, dtype=float)
        if pos.shape != (self.natoms, 3) or not np.all(np.isfinite(pos)):
            raise ValueError(f"positions_bohr must be a finite ({self.natoms}, 3) array, got shape {pos.shape}")
        if guess is not None and not isinstance(guess, CallbackGuess):
            raise ValueError(f"guess must be a CallbackGuess from a previous call or None, got {type(guess).__name__}")
        out = self._call(pos, bool(need_gradients), None if guess is None else guess.state_data)
        t_user = time.perf_counter() - t0
        f, n = self.nstates, self.natoms
        if "energies" not in out:
            raise ValueError("the user function must return 'energies' (F,) in Eh")
        energies = np.asarray(out["energies"], dtype=float).reshape(-1)
        if energies.shape != (f,):
            raise ValueError(f"'energies' must have shape ({f},), got {energies.shape}")
        gradients = None
        if need_gradients:
            if out.get("gradients") is None:
                raise ValueError("the user function must return 'gradients' (F, N, 3) in Eh/Bohr when need_gradients=True")
            gradients = np.array(out["gradients"], dtype=float).reshape(f, n, 3)
        couplings = None if out.get("couplings") is None else np.array(out["couplings"], dtype=float).reshape(f, f, n, 3)
        dipoles = None if out.get("transition_dipoles") is None else np.array(out["transition_dipoles"], dtype=float).reshape(f, f, 3)
        vectors = None if out.get("state_vectors") is None else np.array(out["state_vectors"], dtype=float)
        if vectors is not None and (vectors.ndim != 2 or vectors.shape[1] != f):
            raise ValueError(f"'state_vectors' must have shape (M, {f}) with states as columns, got {vectors.shape}")

        raw = None
        if guess is not None:
            if out.get("overlap_raw") is not None:
                raw = np.array(out["overlap_raw"], dtype=float)
                if raw.shape != (f, f):
                    raise ValueError(f"'overlap_raw' must have shape ({f}, {f}), got {raw.shape}")
                raw = guess.signs[:, None] * raw  # previous states carried the signs applied last time
            elif vectors is not None and guess.state_vectors is not None:
                raw = guess.state_vectors.T @ vectors
        diagnostics: dict[str, Any] = {}
        overlap = None
        signs = np.ones(f)
        if raw is not None:
            match = match_states(raw, self.low_overlap_threshold)
            signs, overlap = match.signs, match.overlap
            diagnostics.update(match.as_diagnostics())
            couplings, dipoles = apply_state_signs(signs, couplings, dipoles)
        if vectors is not None:
            vectors = vectors * signs[None, :]
        diagnostics["timings"] = {"user_function": t_user, "total": time.perf_counter() - t0}
        result = ElectronicResult(
            energies=energies, gradients=gradients, couplings=couplings, overlap_prev=overlap,
            transition_dipoles=dipoles,
            guess=CallbackGuess(pos.copy(), vectors, signs, out.get("state_data")),
            converged=True, diagnostics=diagnostics,
        )
        return result.validate(natoms=n)
