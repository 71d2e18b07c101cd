"""Scattering studies report transmission/reflection per channel, not a lifetime."""

import numpy as np
import pytest

from mapdyn import analysis as A
from mapdyn.core.options import MethodOptions
from mapdyn.core.propagators import run_diabatic
from mapdyn.core.sampling import gaussian_wavepacket_ensemble
from mapdyn.models.regions import default_interaction_region
from mapdyn.models.tully import tully_model
from mapdyn.validation.scattering import run_scattering


@pytest.mark.parametrize("method", ["sqc", "ehrenfest"])
def test_channels_from_last_frames_match_the_exit_harvest(method, tmp_path):
    # Tully 1, k = 15 a.u. from −8 bohr: after 2400 a.u. every trajectory has left the region, and
    # outside it the adiabatic actions no longer change, so reading them at the last frame must give
    # the counts of run_scattering, which reads them at the moment of exit (a separate code path).
    model = tully_model("tully1")
    opts = MethodOptions(method)
    n, seed = 200, 5
    state = gaussian_wavepacket_ensemble(model, n, seed, np.array([-8.0]), np.array([15.0]), np.array([1.0]), 0, opts)
    run = run_diabatic(model, state, opts, 2.0, 1200, record_every=100, record_nuclei=True)
    ts = A.from_diabatic_run(run, initial_states=0)
    region = default_interaction_region(model)
    sc = A.analyze(ts, n_resamples=99, scattering=(region, 1), lifetime_resamples=0).scattering
    ref = run_scattering(model, 15.0, -8.0, 1.0, opts, ntraj=n, seed=seed)
    assert sc.n_inside == 0
    np.testing.assert_allclose(sc.transmission, ref.transmission, atol=1e-12)
    np.testing.assert_allclose(sc.reflection, ref.reflection, atol=1e-12)
    np.testing.assert_allclose(sc.transmission_error, ref.transmission_error, rtol=1e-9, atol=1e-15)
    assert np.all(sc.transmission_low <= sc.transmission + 1e-12) and np.all(sc.transmission <= sc.transmission_high + 1e-12)
    from mapdyn.analysis import report

    res = A.analyze(ts, n_resamples=99, scattering=(region, 1), lifetime_resamples=0)
    text = open(report.write_report(res, tmp_path / "rep").summary).read()
    assert "## Scattering channels" in text and "| transmission | 1 |" in text
    assert "Not reported for a scattering study" in text and "τ =" not in text
