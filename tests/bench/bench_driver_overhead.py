"""Driver overhead: fraction of the step wall time spent outside the electronic backend.

Small molecule: LiH, SA-CASSCF(2,2)/6-31G over 2 singlet states (PySCF, one thread), sqc/square/
symmetrized, started in S1 with 300 K-like random momenta, 0.5 fs steps.  Both times are measured
side by side in the same run: the wall time of ``run()`` and the time inside ``backend.compute``.
A model-adapter run (Tully 1) gives the driver's own cost per step for comparison.

Usage: OMP_NUM_THREADS=1 python tests/bench/bench_driver_overhead.py [steps]
Last line: ``driver_overhead_percent: <value>``.
"""

from __future__ import annotations

import os
import sys
import time

os.environ.setdefault("OMP_NUM_THREADS", "1")

import ase  # noqa: E402
import numpy as np  # noqa: E402
from ase import units  # noqa: E402

from mapdyn.backends.model_adapter import ModelAdapterBackend  # noqa: E402
from mapdyn.backends.pyscf.casscf import CASSCFBackend  # noqa: E402
from mapdyn.core.options import MethodOptions  # noqa: E402
from mapdyn.core.sampling import trajectory_generator  # noqa: E402
from mapdyn.driver.dynamics import MappingDynamics  # noqa: E402
from mapdyn.models.tully import tully_model  # noqa: E402
from mapdyn.units import AMU_IN_ME


def timed_run(dyn: MappingDynamics, steps: int) -> tuple[float, float]:
    b0 = dyn.timings["backend_seconds"]
    t0 = time.perf_counter()
    dyn.run(steps)
    wall = time.perf_counter() - t0
    return wall, dyn.timings["backend_seconds"] - b0


def main(steps: int = 20) -> None:
    rng = trajectory_generator(2026, 0)
    atoms = ase.Atoms("LiH", positions=[[0, 0, 0], [0, 0, 1.6]])
    atoms.set_momenta(rng.normal(size=(2, 3)) * np.sqrt(atoms.get_masses()[:, None] * units.kB * 300.0))
    backend = CASSCFBackend(["Li", "H"], basis="6-31g", ncas=2, nelecas=2, nstates=2)
    dyn = MappingDynamics(atoms, backend, 0.5 * units.fs, 1, MethodOptions(), rng=rng,
                          zero_linear_momentum=True, zero_angular_momentum=True)
    wall, inside = timed_run(dyn, steps)
    outside = wall - inside
    print(f"casscf_steps: {steps}")
    print(f"casscf_step_wall_ms: {1e3 * wall / steps:.2f}")
    print(f"casscf_backend_ms_per_step: {1e3 * inside / steps:.2f}")
    print(f"casscf_driver_ms_per_step: {1e3 * outside / steps:.3f}")
    print(f"casscf_max_drift_Eh: {max(abs(f['drift_Eh']) for f in dyn.frames):.3e}")

    model = tully_model("tully1")
    a = ase.Atoms("H", positions=[[-8.0 * units.Bohr, 0, 0]], masses=[2000.0 / AMU_IN_ME])
    a.set_momenta([[15.0 / (AMU_IN_ME * units.AUT / units.Bohr), 0, 0]])
    model_dyn = MappingDynamics(a, ModelAdapterBackend(model), 2.0 * units.AUT, 0, MethodOptions(),
                                rng=np.random.default_rng(1))
    mwall, minside = timed_run(model_dyn, 2000)
    print(f"model_adapter_driver_ms_per_step: {1e3 * (mwall - minside) / 2000:.3f}")
    print(f"model_adapter_backend_ms_per_step: {1e3 * minside / 2000:.3f}")
    print(f"driver_overhead_percent: {100.0 * outside / wall:.3f}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 20)
