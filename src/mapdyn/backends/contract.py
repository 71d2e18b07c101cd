"""The backend contract: what any source of excited-state data hands the on-the-fly driver.

Everything is in Hartree atomic units (energies in Eh, positions in Bohr, gradients in Eh/Bohr,
couplings in 1/Bohr, dipoles in e·Bohr).

A backend is any object with an integer attribute ``nstates`` and a method

    compute(positions_bohr, guess=None, need_gradients=True) -> ElectronicResult

that is a pure function of its arguments: whatever it needs from the previous step (previous
geometry, orbitals, CI/excitation amplitudes, phases) travels in ``guess``, so a restarted or
repeated step gives the same answer and follows the same branch.

Conventions (docs/architecture.md#backend-contract, docs/theory.md#local-diabatization):

* ``energies`` ascending; index 0 is the ground state on every backend.
* ``couplings[k, l] = d_kl = <psi_k | grad_R psi_l>``, real and antisymmetric.
* Two-phase backends (optional): a backend that also has ``offers_force = True`` and a method

      force(result, weights) -> (M, N, 3) or (N, 3)

  is used in two phases per step: phase one is ``compute(..., need_gradients=False)`` (energies,
  overlaps, transition dipoles and, in ``guess``, the converged wavefunction); phase two returns
  F = −Σ_kl ρ̄_kl ⟨ψ_k|∇H|ψ_l⟩ in Eh/Bohr for real symmetric weight matrices ρ̄ (M, F, F) known only
  after phase one.  Any other backend returns gradients and couplings and the driver contracts them
  with the same weights (:func:`contract_force`).
* ``overlap_prev[k, l] = <psi_k(previous step) | psi_l(this step)>`` *after* sign alignment: each
  new state l is multiplied by s_l = sign of its overlap with the previous state it matches, and the
  same signs are applied to couplings and transition dipoles.  States are never reordered (energy
  order is kept); an identity swap found by the matching is reported in
  ``diagnostics["permutation"]`` and is visible in ``overlap_prev`` as a near-permutation matrix.
"""

from __future__ import annotations

import dataclasses
from typing import Any, Protocol, runtime_checkable

import numpy as np
from scipy.optimize import linear_sum_assignment

__all__ = [
    "ElectronicResult",
    "Backend",
    "BackendError",
    "RegionReached",
    "ended_channel",
    "StateMatch",
    "match_states",
    "apply_state_signs",
    "ForceBackend",
    "offers_force",
    "check_weights",
    "contract_force",
]

#: min |S_{pi(l), l}| below which a step is reported as a low-overlap step (states may have
#: changed character faster than the time step resolves).
LOW_OVERLAP_THRESHOLD = 0.5


class BackendError(RuntimeError):
    """An electronic-structure calculation failed.

    ``reason`` is a one-line explanation; ``attempts`` lists what was tried (each a dict with at
    least a ``"what"`` and ``"outcome"`` key).
    """

    def __init__(self, reason: str, attempts: list[dict] | None = None):
        self.reason = reason
        self.attempts = list(attempts or [])
        detail = "; ".join(f"{a.get('what')}: {a.get('outcome')}" for a in self.attempts)
        super().__init__(reason + (f" (attempts: {detail})" if detail else ""))


class RegionReached(Exception):
    """The geometry lies where the electronic-structure method stops being valid, and reaching it is a
    result: the trajectory ends there as an outcome of its own (a channel), not as a failure.

    ``channel`` : short label counted by the analysis (e.g. "S1/S0 region").
    ``reason`` : one line with the numbers that triggered the rule.
    ``values`` : those numbers (atomic units; keys name them, e.g. ``gap_Eh``).
    The driver turns it into a stop with reason ``"ended: <channel>; <reason>"`` (:func:`ended_channel`).
    """

    def __init__(self, channel: str, reason: str, values: dict | None = None):
        self.channel = str(channel)
        self.reason = str(reason)
        self.values = dict(values or {})
        super().__init__(f"{self.channel}: {self.reason}")


#: Prefix of the stop reason of a trajectory that ended in a channel (see :class:`RegionReached`).
ENDED_PREFIX = "ended: "


def ended_channel(stop_reason: str | None) -> str | None:
    """The channel of a trajectory whose stop reason reads ``"ended: <channel>; …"``, else None."""
    if not stop_reason or not stop_reason.startswith(ENDED_PREFIX):
        return None
    return stop_reason[len(ENDED_PREFIX):].split(";", 1)[0].strip() or None


@dataclasses.dataclass
class ElectronicResult:
    """Electronic data at one geometry, atomic units throughout.

    Attributes
    ----------
    energies : (F,) adiabatic energies in Eh, ascending; index 0 is the ground state.
    gradients : (F, N, 3) dE_k/dR in Eh/Bohr, or None when not requested.
    couplings : (F, F, N, 3) d_kl = <psi_k|grad psi_l> in 1/Bohr (antisymmetric), or None when the
        method has no coupling vectors.
    overlap_prev : (F, F) S_kl = <psi_k(prev)|psi_l(this)> after sign alignment, None on the
        first call.
    transition_dipoles : (F, F, 3) <psi_k|mu|psi_l> in e·Bohr, or None.
    spin_squared : (F,) <S^2> per state (dimensionless), or None.
    guess : opaque picklable object the next call needs.
    converged : whether every solver converged.
    diagnostics : timings (seconds), iterations, fallback attempts, ``permutation`` found by state
        matching, ``min_overlap``, ``swap`` and ``low_overlap`` flags.
    """

    energies: np.ndarray
    gradients: np.ndarray | None = None
    couplings: np.ndarray | None = None
    overlap_prev: np.ndarray | None = None
    transition_dipoles: np.ndarray | None = None
    spin_squared: np.ndarray | None = None
    guess: Any = None
    converged: bool = True
    diagnostics: dict = dataclasses.field(default_factory=dict)

    @property
    def nstates(self) -> int:
        return int(np.shape(self.energies)[0])

    def validate(self, natoms: int | None = None) -> "ElectronicResult":
        """Check shapes, finiteness and ordering; raise ValueError naming the bad field."""
        e = np.asarray(self.energies, dtype=float)
        if e.ndim != 1 or e.size < 1:
            raise ValueError(f"energies must have shape (F,), got {e.shape}")
        f = e.size
        if not np.all(np.isfinite(e)):
            raise ValueError("energies contain non-finite values")
        if np.any(np.diff(e) < -1e-12):
            raise ValueError(f"energies must be ascending, got {e.tolist()}")
        if self.gradients is not None:
            g = np.asarray(self.gradients)
            n = natoms if natoms is not None else g.shape[1] if g.ndim == 3 else -1
            if g.shape != (f, n, 3):
                raise ValueError(f"gradients must have shape ({f}, {n}, 3), got {g.shape}")
            if not np.all(np.isfinite(g)):
                raise ValueError("gradients contain non-finite values")
        if self.couplings is not None:
            d = np.asarray(self.couplings)
            if d.ndim != 4 or d.shape[:2] != (f, f) or d.shape[3] != 3:
                raise ValueError(f"couplings must have shape ({f}, {f}, N, 3), got {d.shape}")
            if not np.all(np.isfinite(d)):
                raise ValueError("couplings contain non-finite values")
            if np.max(np.abs(d + np.swapaxes(d, 0, 1)), initial=0.0) > 1e-6 * max(1.0, np.max(np.abs(d))):
                raise ValueError("couplings must be antisymmetric: d_kl = -d_lk")
        if self.overlap_prev is not None:
            s = np.asarray(self.overlap_prev)
            if s.shape != (f, f):
                raise ValueError(f"overlap_prev must have shape ({f}, {f}), got {s.shape}")
            if not np.all(np.isfinite(s)):
                raise ValueError("overlap_prev contains non-finite values")
        return self


@runtime_checkable
class Backend(Protocol):
    """Anything that supplies electronic data at a geometry (see module docstring)."""

    nstates: int

    def compute(self, positions_bohr: np.ndarray, guess: Any = None,
                need_gradients: bool = True) -> ElectronicResult: ...


@runtime_checkable
class ForceBackend(Backend, Protocol):
    """A two-phase backend (see module docstring): phase two is :meth:`force`."""

    offers_force: bool

    def force(self, result: ElectronicResult, weights: np.ndarray) -> np.ndarray: ...


def offers_force(backend: Any) -> bool:
    """True when ``backend`` offers phase two (``offers_force`` true and a callable ``force``)."""
    return bool(getattr(backend, "offers_force", False)) and callable(getattr(backend, "force", None))


def check_weights(weights: np.ndarray, nstates: int) -> np.ndarray:
    """Weight matrices as a float (M, F, F) array; ValueError unless finite, real and symmetric."""
    w = np.asarray(weights)
    if np.iscomplexobj(w):
        raise ValueError("weights must be real symmetric matrices, got complex values")
    w = np.array(w, dtype=float).reshape((-1,) + w.shape[-2:]) if w.ndim >= 2 else w
    if w.ndim != 3 or w.shape[1:] != (nstates, nstates):
        raise ValueError(f"weights must have shape ({nstates}, {nstates}) or (M, {nstates}, {nstates}), "
                         f"got {np.shape(weights)}")
    if not np.all(np.isfinite(w)):
        raise ValueError("weights contain non-finite values")
    if np.max(np.abs(w - w.transpose(0, 2, 1)), initial=0.0) > 1e-12 * max(1.0, float(np.max(np.abs(w)))):
        raise ValueError("weights must be symmetric matrices")
    return w


def contract_force(energies: np.ndarray, gradients: np.ndarray, couplings: np.ndarray | None,
                   weights: np.ndarray) -> np.ndarray:
    """F = −Σ_kl ρ̄_kl ⟨ψ_k|∇H|ψ_l⟩ (Eh/Bohr) from gradients and coupling vectors.

    ⟨ψ_k|∇H|ψ_k⟩ = ∇E_k and ⟨ψ_k|∇H|ψ_l⟩ = (E_l − E_k) d_kl for k ≠ l (Hellmann–Feynman and the
    off-diagonal derivative identity); ``energies`` (F,) Eh, ``gradients`` (F, N, 3) Eh/Bohr,
    ``couplings`` (F, F, N, 3) 1/Bohr or None (diagonal terms only); ``weights`` (F, F) or
    (M, F, F), real symmetric, dimensionless.  Returns (N, 3) or (M, N, 3).
    """
    w_in = np.asarray(weights, dtype=float)
    E = np.asarray(energies, dtype=float)
    w = w_in.reshape((-1,) + w_in.shape[-2:])
    diag = np.einsum("mkk->mk", w)
    F = -np.einsum("mk,kna->mna", diag, np.asarray(gradients))
    if couplings is not None:
        off = w * (E[None, None, :] - E[None, :, None])
        idx = np.arange(E.size)
        off[:, idx, idx] = 0.0
        F -= np.einsum("mkl,klna->mna", off, np.asarray(couplings))
    return F[0] if w_in.ndim == 2 else F


@dataclasses.dataclass
class StateMatch:
    """Outcome of matching new states to previous ones from their raw overlap matrix.

    ``permutation[l]`` is the previous-step state matched to new state l; ``signs[l]`` = ±1 is the
    sign applied to new state l; ``overlap`` is the sign-aligned overlap matrix.
    """

    permutation: np.ndarray
    signs: np.ndarray
    overlap: np.ndarray
    min_overlap: float
    swap: bool
    low_overlap: bool

    def as_diagnostics(self) -> dict:
        return {
            "permutation": self.permutation.tolist(),
            "signs": self.signs.tolist(),
            "min_overlap": self.min_overlap,
            "swap": self.swap,
            "low_overlap": self.low_overlap,
        }


def match_states(overlap_raw: np.ndarray, low_overlap_threshold: float = LOW_OVERLAP_THRESHOLD) -> StateMatch:
    """Match new states to previous ones and fix their signs (docs/theory.md#local-diabatization step 5).

    ``overlap_raw[k, l] = <psi_k(prev)|psi_l(new, raw phase)>``.  The assignment maximises
    sum |S_{pi(l), l}| (``scipy.optimize.linear_sum_assignment`` on −|S|); the sign of new state l is
    s_l = sign(S_{pi(l), l}) and the aligned overlap is S_kl s_l.
    """
    s = np.asarray(overlap_raw, dtype=float)
    if s.ndim != 2 or s.shape[0] != s.shape[1]:
        raise ValueError(f"overlap matrix must be square, got shape {s.shape}")
    rows, cols = linear_sum_assignment(-np.abs(s))
    perm = np.empty(s.shape[1], dtype=int)
    perm[cols] = rows
    matched = s[perm, np.arange(s.shape[1])]
    signs = np.where(matched < 0.0, -1.0, 1.0)
    aligned = s * signs[None, :]
    min_ov = float(np.min(np.abs(matched))) if matched.size else 1.0
    return StateMatch(
        permutation=perm,
        signs=signs,
        overlap=aligned,
        min_overlap=min_ov,
        swap=bool(np.any(perm != np.arange(perm.size))),
        low_overlap=min_ov < low_overlap_threshold,
    )


def apply_state_signs(signs: np.ndarray, couplings: np.ndarray | None = None,
                      transition_dipoles: np.ndarray | None = None):
    """Return (couplings, transition_dipoles) for states psi_l -> s_l psi_l: X_kl -> s_k s_l X_kl."""
    s = np.asarray(signs, dtype=float)
    ss = s[:, None] * s[None, :]
    d = None if couplings is None else couplings * ss[:, :, None, None]
    mu = None if transition_dipoles is None else transition_dipoles * ss[:, :, None]
    return d, mu
