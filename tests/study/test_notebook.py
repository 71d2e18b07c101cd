"""The notebook path: a study from a dict or TOML text, run in-process, results as a Dataset."""

import tomllib

import numpy as np
from conftest import tully1_study


def test_dict_and_toml_text_studies_run_and_give_the_same_dataset(tmp_path):
    import mapdyn

    text = tully1_study(name="nb", trajectories=12, duration="200 au", workers=1, batch=6)
    spec = tomllib.loads(text)
    ds = mapdyn.run_study(spec, tmp_path / "from_dict")                   # the five-line notebook path
    assert ds["actions"].dims == ("time", "trajectory", "state") and ds.sizes["trajectory"] == 12
    assert set(ds["status"].values) == {"finished"}
    assert ds["time"].attrs["units"].startswith("a.u.")
    # the folder reopens from its stored input (a dict has no file: its TOML text is written)
    from mapdyn.study.folder import Study

    study = Study(str(tmp_path / "from_dict"))
    assert study.config.ensemble.trajectories == 12 and study.status().counts()["finished"] == 12
    again = mapdyn.run_study(spec, tmp_path / "from_dict")                # nothing left to run: same data
    np.testing.assert_array_equal(again["actions"].values, ds["actions"].values)
    ds2 = mapdyn.run_study(text, tmp_path / "from_text")                  # TOML string, same seed
    np.testing.assert_array_equal(ds2["actions"].values, ds["actions"].values)


def test_dict_study_with_values_toml_cannot_hold_is_refused(tmp_path):
    import pytest

    import mapdyn
    from mapdyn.study.config import ConfigError

    spec = tomllib.loads(tully1_study(name="nb2", trajectories=4))
    spec["ensemble"]["seed"] = object()
    with pytest.raises(ConfigError, match="cannot be written as TOML"):
        mapdyn.run_study(spec, tmp_path / "bad")
