"""A diabatic model from user Python callables H(R) and ∇H(R), batched or one geometry at a time.

    model = CallableModel(hamiltonian, gradient, nstates=F, ndof=D, masses=M, batched=True)

batched=True:  hamiltonian(R (n, D)) → (n, F, F) Eh;   gradient(R (n, D)) → (n, D, F, F) Eh/Bohr.
batched=False: hamiltonian(R (D,)) → (F, F);           gradient(R (D,)) → (D, F, F); called once per row.
Optionally ``contract_gradient(R (n, D), rho (n, F, F)) → (n, D)`` (batched) supplies the force
contraction Σ_kl ρ_kl ∂H_kl/∂R directly, so a large model need not build (n, D, F, F).
Optionally ``harmonic_frequencies`` (D,) declares V0 = Σ ½ m ω² R² as the state-independent
part of H; the stiff-bath integrator then treats H − V0·1 (computed as H minus V0) as the system.
Outputs are checked for shape, finiteness and symmetry (ValueError naming the callable).
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from mapdyn.core.model import DiabaticModel, as_positions

__all__ = ["CallableModel"]


class CallableModel(DiabaticModel):
    """Diabatic model wrapping user callables (atomic units: Bohr, Eh, electron masses)."""

    name = "callable"

    def __init__(self, hamiltonian: Callable, gradient: Callable, nstates: int, ndof: int, masses,
                 batched: bool = True, contract_gradient: Callable | None = None,
                 harmonic_frequencies=None, name: str = "callable"):
        if not callable(hamiltonian):
            raise ValueError("hamiltonian must be a callable H(R)")
        if not callable(gradient):
            raise ValueError("gradient must be a callable dH/dR(R)")
        if contract_gradient is not None and not callable(contract_gradient):
            raise ValueError("contract_gradient must be a callable (R, rho) -> (n, D) or None")
        for nm, v, lo in (("nstates", nstates, 2), ("ndof", ndof, 1)):
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < lo:
                raise ValueError(f"{nm}={v!r} is not allowed; it must be an integer >= {lo}")
        if not isinstance(batched, bool):
            raise ValueError(f"batched={batched!r} is not allowed; it must be True or False")
        m = np.broadcast_to(np.asarray(masses, dtype=float), (int(ndof),)).copy()
        if not np.all(np.isfinite(m)) or np.any(m <= 0):
            raise ValueError("masses must be positive finite numbers (electron masses)")
        self.nstates, self.ndof, self.masses = int(nstates), int(ndof), m
        self._H, self._dH, self._contract = hamiltonian, gradient, contract_gradient
        self.batched, self.name = batched, str(name)
        if harmonic_frequencies is not None:
            w = np.broadcast_to(np.asarray(harmonic_frequencies, dtype=float), (self.ndof,)).copy()
            if not np.all(np.isfinite(w)) or np.any(w <= 0):
                raise ValueError("harmonic_frequencies must be positive finite numbers (Eh)")
            self.harmonic_frequencies = w
            self._k = m * w * w

    def _call(self, fn, label: str, R: np.ndarray, tail: tuple) -> np.ndarray:
        if self.batched:
            out = np.asarray(fn(R), dtype=float)
        else:
            out = np.asarray([np.asarray(fn(r.copy()), dtype=float) for r in R])
        want = (R.shape[0],) + tail
        if out.shape != want:
            raise ValueError(f"{label} returned shape {out.shape}, expected {want} "
                             f"({'batched' if self.batched else 'per geometry'})")
        if not np.all(np.isfinite(out)):
            raise ValueError(f"{label} returned non-finite values")
        if not np.allclose(out, np.swapaxes(out, -1, -2), rtol=1e-12, atol=1e-14):
            raise ValueError(f"{label} returned matrices that are not symmetric in the state indices")
        return out

    def hamiltonian(self, R: np.ndarray) -> np.ndarray:
        R = as_positions(R, self.ndof)
        return self._call(self._H, "hamiltonian", R, (self.nstates, self.nstates))

    def hamiltonian_gradient(self, R: np.ndarray) -> np.ndarray:
        R = as_positions(R, self.ndof)
        return self._call(self._dH, "gradient", R, (self.ndof, self.nstates, self.nstates))

    def contract_gradient(self, R: np.ndarray, rho: np.ndarray) -> np.ndarray:
        if self._contract is None:
            return super().contract_gradient(R, rho)
        R = as_positions(R, self.ndof)
        out = np.asarray(self._contract(R, rho), dtype=float)
        if out.shape != R.shape or not np.all(np.isfinite(out)):
            raise ValueError(f"contract_gradient returned shape {out.shape} (or non-finite values), expected {R.shape}")
        return out

    # Harmonic split, only when harmonic_frequencies was given (used by HarmonicBathIntegrator).
    system_gradient_is_constant = False

    def harmonic_potential(self, R: np.ndarray) -> np.ndarray:
        """V0 = Σ ½ m ω² R² (Eh), (n,); needs ``harmonic_frequencies``."""
        R = as_positions(R, self.ndof)
        return 0.5 * (R * R) @ self._k

    def system_hamiltonian(self, R: np.ndarray) -> np.ndarray:
        """H(R) − V0(R)·1, (n, F, F) Eh; needs ``harmonic_frequencies``."""
        R = as_positions(R, self.ndof)
        H = self.hamiltonian(R)
        idx = np.arange(self.nstates)
        H[:, idx, idx] -= self.harmonic_potential(R)[:, None]
        return H

    def system_contract_gradient(self, R: np.ndarray, rho: np.ndarray) -> np.ndarray:
        """Σ_kl ρ_kl ∂(H − V0·1)_kl/∂R = contract_gradient − Tr ρ · m ω² R, (n, D) Eh/Bohr."""
        R = as_positions(R, self.ndof)
        tr = np.trace(rho, axis1=1, axis2=2)
        return self.contract_gradient(R, rho) - tr[:, None] * self._k * R
