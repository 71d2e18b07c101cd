"""What the on-the-fly driver records beside the propagation: frames, the drift policy, extxyz files.

Frames are plain dicts in atomic units (keys listed in :class:`FrameRecorder`); :func:`frame_atoms`
turns one into an ``ase.Atoms`` (Å, ASE momenta) and :func:`write_frames_extxyz` writes them.
"""

from __future__ import annotations

import dataclasses
import os

import numpy as np
from ase import Atoms, units

from mapdyn.backends.contract import ElectronicResult
from mapdyn.core.adiabatic import mapping_potential_energy, nuclear_kinetic_energy
from mapdyn.core.mapping import actions
from mapdyn.core.options import MethodOptions
from mapdyn.core.populations import population_weights
from mapdyn.core.windows import window_assignment
from mapdyn.driver.state import DriverState
from mapdyn.files import atomic_open
from mapdyn.units import AMU_IN_ME, ASE_MOMENTUM_IN_AU

__all__ = ["FrameRecorder", "DriftMonitor", "frame_atoms", "backend_frame_diagnostics", "electronic_discontinuity", "DISCONTINUITY_OVERLAP",
           "write_frames_extxyz"]

def state_populations(e: np.ndarray, options: MethodOptions) -> tuple[np.ndarray, int]:
    """Populations (F,) from actions e (F,) and the window index: SQC indicators 0/1 and the
    assigned window (−1 = none), or e_k/Σe and −1 for Ehrenfest (weights of
    :func:`mapdyn.core.populations.population_weights`)."""
    w = population_weights(e[None], options)[0]
    if options.method == "ehrenfest":
        return w / w.sum(), -1
    return w, int(window_assignment(e[None], options)[0])


def backend_frame_diagnostics(diagnostics: dict) -> dict:
    """Per-frame backend health numbers (NaN where the backend does not report one):
    ``active_space_change`` 1/0 (CASSCF active orbitals rotated out of the previous space),
    ``active_overlap_min_singular`` (smallest singular value of the active-orbital overlap),
    ``overlap_retries`` (extra CASSCF solutions tried because the state overlap was low),
    ``response_residual`` (largest TDDFT Z-vector residual), ``response_converged`` 1/0 (CASSCF
    gradient and coupling response equations), ``root_window_min`` (smallest summed squared overlap
    of a previous propagated state with all computed roots, TDDFT root buffer) and
    ``root_buffer_entry`` 1/0 (a propagated state now matches a buffer root best)."""
    d = diagnostics or {}
    nan = float("nan")

    def flag(v):
        return nan if v is None else float(bool(v))

    retry = d.get("overlap_retry")
    res = d.get("cphf_residuals")
    weight = d.get("root_window_weight")
    tracking = d.get("root_tracking")
    conv = None
    if "gradients_converged" in d or "couplings_converged" in d:
        conv = bool(d.get("gradients_converged", True)) and bool(d.get("couplings_converged", True))
    return {"active_space_change": flag(d.get("active_space_change")),
            "active_overlap_min_singular": float(d.get("active_overlap_min_singular", nan)),
            "overlap_retries": float(max(len(retry.get("candidates", [])) - 1, 0)) if isinstance(retry, dict) else 0.0,
            "response_residual": float(np.nanmax(res)) if res is not None and len(res) else nan,
            "response_converged": flag(conv),
            "root_window_min": float(np.min(weight)) if weight is not None and len(weight) else nan,
            "root_buffer_entry": nan if tracking is None else float("entered buffer" in tracking)}


@dataclasses.dataclass
class FrameRecorder:
    """Records one frame dict per call into :attr:`frames` (atomic units).

    Keys: ``step``, ``time_au``, ``positions_bohr`` (N, 3), ``momenta_au`` (N, 3), ``energies_Eh``
    (F,), ``actions`` (F,), ``populations`` (F,), ``window``, ``kinetic_energy_Eh``,
    ``potential_energy_Eh``, ``total_energy_Eh``, ``drift_Eh``, ``coupling_norms`` (F, F) |d_kl| in
    1/Bohr or None, ``sigma`` (F, F) mid-step σ in 1/a.u. time or None, ``min_overlap``, ``swap``,
    ``permutation``.  masses_au: (N,) electron masses.
    """

    options: MethodOptions
    masses_au: np.ndarray
    interval: int = 1
    frames: list = dataclasses.field(default_factory=list)

    def due(self, step: int) -> bool:
        return step % self.interval == 0

    def record(self, st: DriverState, rho: np.ndarray, sigma: np.ndarray | None) -> None:
        """Append the frame of ``st`` with density ρ (F, F) and the mid-step σ of the last step."""
        e = actions(st.x[None], st.p[None])[0]
        pops, window = state_populations(e, self.options)
        r = st.result
        kin = nuclear_kinetic_energy(st.momenta, self.masses_au)
        pot = mapping_potential_energy(rho, r.energies)
        nstates = len(e)
        self.frames.append({
            "step": st.step, "time_au": st.time,
            "positions_bohr": st.positions.copy(), "momenta_au": st.momenta.copy(),
            "energies_Eh": np.asarray(r.energies, dtype=float).copy(),
            "actions": e, "populations": pops, "window": window,
            "kinetic_energy_Eh": kin, "potential_energy_Eh": pot,
            "total_energy_Eh": kin + pot, "drift_Eh": kin + pot - st.energy_reference,
            "coupling_norms": None if r.couplings is None else np.linalg.norm(
                np.asarray(r.couplings).reshape(nstates, nstates, -1), axis=2),
            "sigma": None if sigma is None else np.array(sigma),
            "min_overlap": r.diagnostics.get("min_overlap"), "swap": bool(r.diagnostics.get("swap", False)),
            "permutation": r.diagnostics.get("permutation"),
            **backend_frame_diagnostics(r.diagnostics),
        })


@dataclasses.dataclass
class DriftMonitor:
    """Flags (and optionally stops) a trajectory whose |E(t) − E(0)| exceeds ``threshold`` (Eh).

    threshold None: monitor only.  The first crossing is recorded in ``state.drift_flag``
    ({step, time_au, drift_Eh, threshold_Eh}); with ``stop`` the state is marked stopped.
    """

    threshold: float | None
    stop: bool = False

    def check(self, st: DriverState, drift: float) -> None:
        """Apply the policy to ``st`` for the current drift (Eh)."""
        if self.threshold is None or st.drift_flag is not None or not abs(drift) > self.threshold:
            return
        st.drift_flag = {"step": st.step, "time_au": st.time, "drift_Eh": drift, "threshold_Eh": self.threshold}
        if self.stop:
            st.stopped = True
            st.stop_reason = f"energy drift {drift:.3e} Eh exceeds {self.threshold:.3e} Eh at step {st.step}"


def frame_atoms(frame: dict, symbols: list[str], masses_au: np.ndarray) -> Atoms:
    """An ase.Atoms of a recorded frame (Å, ASE momenta) with its electronic data in ``info``.

    ``info``: step, time_fs, energies_Eh, actions, populations, window, total_energy_Eh and, with
    coupling vectors, coupling_norms_upper (upper triangle of |d_kl|, 1/Bohr).
    """
    a = Atoms(symbols, positions=frame["positions_bohr"] * units.Bohr,
              masses=masses_au / AMU_IN_ME, pbc=False)
    a.set_momenta(frame["momenta_au"] / ASE_MOMENTUM_IN_AU)
    a.info.update({"step": int(frame["step"]), "time_fs": frame["time_au"] * units.AUT / units.fs,
                   "energies_Eh": frame["energies_Eh"], "actions": frame["actions"],
                   "populations": frame["populations"], "window": int(frame["window"]),
                   "total_energy_Eh": frame["total_energy_Eh"]})
    if frame["coupling_norms"] is not None:
        iu = np.triu_indices(len(frame["energies_Eh"]), 1)
        a.info["coupling_norms_upper"] = frame["coupling_norms"][iu]
    return a


def write_frames_extxyz(path: str | os.PathLike, images: list[Atoms]) -> None:
    """Write ``images`` as extxyz, atomically (:func:`mapdyn.files.atomic_open`)."""
    from ase.io import write

    with atomic_open(path, "w") as fh:
        write(fh, images, format="extxyz")


#: Smallest matched state overlap with the previous step below which a step whose active orbitals
#: changed (backend diagnostic ``active_space_change``) counts as a jump between solutions.
DISCONTINUITY_OVERLAP = 0.5


def electronic_discontinuity(result: ElectronicResult, floor: float = DISCONTINUITY_OVERLAP) -> str | None:
    """One-line reason when the backend changed electronic solution in this step, else None.

    A jump needs both an active-space change (an orbital left the active space; backend diagnostic
    ``active_space_change``) and a smallest matched state overlap (dimensionless) below ``floor``:
    the states are then other states, the potential energy surface is discontinuous and no time step
    conserves the energy across it (CH2NH2+ SA2-CASSCF(2,2)/STO-3G at C–N 3.2 Å: 40 mEh, overlap
    0.07).  Passages through an intersection keep the orbitals and are not affected.
    """
    d = result.diagnostics or {}
    overlap = d.get("min_overlap")
    if not d.get("active_space_change") or overlap is None or not overlap < floor:
        return None
    sv = d.get("active_overlap_min_singular")
    return ("electronic structure discontinuous: an orbital left the active space"
            + ("" if sv is None else f" (active-orbital overlap {sv:.2f})")
            + f" and the smallest state overlap with the previous step is {overlap:.2f} < {floor}")
