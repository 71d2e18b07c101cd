"""Checkpoint cost and restart fidelity on a small molecule (SA2-CASSCF(2,2)/STO-3G ethylene).

Side by side in one run:
1. the same trajectory for N steps without checkpoints, and with a frame chunk + restart state
   committed every K = 10 steps (atomic HDF5 writes with fsync); printed: the time spent in the
   commits as a fraction of the dynamics time (target < 2 %), and the wall-time ratio;
2. restart fidelity: N steps uninterrupted vs N/2 steps, the state reloaded from disk into a
   fresh driver with a fresh backend object (as a new process would), then N/2 more steps;
   printed: largest |ΔR| (Bohr), |Δactions| and |ΔE_total| (Eh) over the second half.

Run: OMP_NUM_THREADS=1 python tests/bench/bench_checkpoint_cost.py [nsteps]
"""

from __future__ import annotations

import os
import sys
import tempfile
import time
import warnings

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402
from ase import Atoms, units  # noqa: E402

from mapdyn.backends.pyscf.casscf import CASSCFBackend  # noqa: E402
from mapdyn.core.options import MethodOptions  # noqa: E402
from mapdyn.core.sampling import trajectory_generator  # noqa: E402
from mapdyn.driver.dynamics import MappingDynamics  # noqa: E402
from mapdyn.study.checkpoint import TrajectoryStore  # noqa: E402

K = 10
SYMBOLS = ["C", "C", "H", "H", "H", "H"]
POS = np.array([[0, 0, 0.6695], [0, 0, -0.6695], [0, 0.9289, 1.2321], [0, -0.9289, 1.2321],
                [0, 0.9289, -1.2321], [0, -0.9289, -1.2321]])  # Å


def backend():
    return CASSCFBackend(SYMBOLS, basis="sto-3g", ncas=2, nelecas=2, nstates=2)


def atoms():
    a = Atoms(SYMBOLS, positions=POS)
    rng = np.random.default_rng(3)
    # a small random velocity (about room-temperature scale), fixed seed
    a.set_momenta(rng.normal(0, 1.0, (6, 3)) * np.sqrt(a.get_masses())[:, None] * 0.01)
    return a


def driver(restart_state=None):
    kw = dict(restart_state=restart_state) if restart_state is not None else dict(rng=trajectory_generator(1, 0))
    return MappingDynamics(atoms(), backend(), 0.5 * units.fs, 1, MethodOptions(window="triangle"), **kw)


def main(nsteps: int = 40) -> None:
    warnings.simplefilter("ignore")
    # 1. cost ----------------------------------------------------------------------------------
    plain = driver()
    t0 = time.perf_counter()
    plain.run(nsteps)
    t_plain = time.perf_counter() - t0
    with tempfile.TemporaryDirectory() as tmp:
        store = TrajectoryStore(os.path.join(tmp, "traj"))
        dyn = driver()
        t_commit = 0.0
        t0 = time.perf_counter()
        c0 = time.perf_counter()
        chunks, digests = store.commit(dyn.state, dyn.frames, 0, {}, [])
        t_commit += time.perf_counter() - c0
        dyn.frames.clear()
        while dyn.state.step < nsteps:
            dyn.run(K)
            c0 = time.perf_counter()
            chunks, digests = store.commit(dyn.state, dyn.frames, chunks, {}, digests)
            t_commit += time.perf_counter() - c0
            dyn.frames.clear()
        t_ck = time.perf_counter() - t0
        state_kb = os.path.getsize(store.state_path) / 1024
        # 2. restart fidelity --------------------------------------------------------------------
        half = TrajectoryStore(os.path.join(tmp, "half"))
        d1 = driver()
        ch, dg = half.commit(d1.state, d1.frames, 0, {}, [])
        d1.frames.clear()
        d1.run(nsteps // 2)
        half.commit(d1.state, d1.frames, ch, {}, dg)
        point = half.restart_point()
        d2 = driver(point.state)
        d2.run(nsteps - nsteps // 2)
        second = d2.frames
        ref = {f["step"]: f for f in plain.frames}
        dR = max(np.max(np.abs(f["positions_bohr"] - ref[f["step"]]["positions_bohr"])) for f in second)
        de = max(np.max(np.abs(f["actions"] - ref[f["step"]]["actions"])) for f in second)
        dE = max(abs(f["total_energy_Eh"] - ref[f["step"]]["total_energy_Eh"]) for f in second)
    per_step = t_plain / nsteps
    print(f"system: ethylene SA2-CASSCF(2,2)/STO-3G, {nsteps} steps of 0.5 fs, one thread")
    print(f"step_seconds: {per_step:.3f}")
    print(f"commit_seconds_each: {t_commit / (nsteps // K + 1):.4f}  (state file {state_kb:.0f} KiB)")
    print(f"checkpoint_fraction_K10: {t_commit / (t_ck - t_commit):.4f}")
    print(f"wall_ratio_with_over_without: {t_ck / t_plain:.3f}  (two separate runs: includes machine-load noise)")
    print(f"restart_max_abs_dR_bohr: {dR:.3e}")
    print(f"restart_max_abs_dactions: {de:.3e}")
    print(f"restart_max_abs_dE_total_hartree: {dE:.3e}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 40)
