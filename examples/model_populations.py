"""Demo (a scenario of our own): SQC and Ehrenfest on Tully's simple avoided crossing.

2000 mapping trajectories start on the lower adiabat at x0 = −10 Bohr with momentum k; the script
prints the final adiabatic populations for three momenta and each method.  Runs in seconds.

    python examples/model_populations.py
"""

import numpy as np

from mapdyn.core.options import MethodOptions
from mapdyn.core.propagators import run_diabatic
from mapdyn.core.sampling import gaussian_wavepacket_ensemble
from mapdyn.models.tully import SimpleAvoidedCrossing


def main() -> None:
    model = SimpleAvoidedCrossing()
    methods = [MethodOptions("sqc", "square"), MethodOptions("sqc", "triangle"), MethodOptions("ehrenfest")]
    print(f"{'momentum':>9} {'method':>26} {'P(lower)':>9} {'P(upper)':>9} {'no window':>9}")
    for k in (12.0, 20.0, 30.0):
        v = k / model.masses[0]
        nsteps = int(20.0 / v)  # long enough to travel from −10 to +10 Bohr
        for opts in methods:
            state = gaussian_wavepacket_ensemble(model, 2000, 7, -10.0, k, 10.0 / k, 0, opts)
            run = run_diabatic(model, state, opts, 1.0, nsteps, record_every=nsteps)
            pops, none = run.populations("adiabatic")
            print(f"{k:9.1f} {opts.describe():>26} {pops[-1, 0]:9.3f} {pops[-1, 1]:9.3f} {none[-1]:9d}")
    print("(simulated populations, a.u.; no-window = trajectories outside every SQC window)")


if __name__ == "__main__":
    np.set_printoptions(precision=3)
    main()
