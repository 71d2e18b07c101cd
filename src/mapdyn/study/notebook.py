"""Studies from Python: build from a dict, a TOML string or a file, run, get the results back.

    import mapdyn
    spec = {"electronic": {"backend": "model", "model": "tully1"}, ...}   # or a TOML string / path
    ds = mapdyn.run_study(spec, folder="runs/nb", workers=1)              # xarray.Dataset
    ds["population"].plot.line(x="time_fs")

Same folder, same files and same resumability as ``mapdyn run``: calling :func:`run_study` again
with the same input continues (or just reloads) the study.
"""

from __future__ import annotations

import os
import tomllib
from typing import Any, Callable, Mapping

from mapdyn.study.config import ConfigError, StudyConfig, load_study_config, parse_study
from mapdyn.study.folder import Study

__all__ = ["study_config", "create_study", "run_study"]


def study_config(spec: Any, *, name: str | None = None) -> StudyConfig:
    """A validated :class:`StudyConfig` from a mapping, a TOML string or a TOML file path;
    ``name`` is used when the input has no ``study.name``."""
    if isinstance(spec, StudyConfig):
        return spec
    if isinstance(spec, Mapping):
        return parse_study(spec, default_name=name or "study")
    if isinstance(spec, (str, os.PathLike)):
        text = os.fspath(spec)
        if "\n" not in text and os.path.isfile(text):
            return load_study_config(text, default_name=name)
        if "[" not in text:
            raise ConfigError(text, "file not found (and not TOML text with [sections])")
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as err:
            raise ConfigError("study input", f"is not valid TOML ({err})") from None
        return parse_study(data, source_text=text, default_name=name or "study")
    raise ConfigError("study input", f"must be a mapping, TOML text or a file path, not {type(spec).__name__}")


def create_study(spec: Any, folder: str | os.PathLike | None = None, *, name: str | None = None) -> Study:
    """The study folder of ``spec`` (created, or reopened when it holds the same input)."""
    cfg = study_config(spec, name=name)
    return Study.create(cfg, None if folder is None else os.fspath(folder))


def run_study(spec: Any, folder: str | os.PathLike | None = None, *, workers: int | None = None,
              report: bool = False, progress: bool = False, name: str | None = None,
              log: Callable[[str], None] | None = None) -> Any:
    """Create (or reopen) the study, prepare initial conditions (molecules), run what is missing,
    optionally write ``report/``, and return :func:`mapdyn.study.export.load_results` — an
    ``xarray.Dataset`` (time × trajectory × state, units in ``attrs``).

    ``workers`` defaults to ``ensemble.workers``; ``progress`` shows a progress bar (tqdm).
    Failed trajectories are kept in the dataset with ``status = "failed"``.
    """
    from mapdyn.progress import ensemble_bar
    from mapdyn.study.analyze import write_study_report
    from mapdyn.study.export import load_results
    from mapdyn.study.runner import run_ensemble

    study = create_study(spec, folder, name=name)
    say = log or (lambda s: None)
    if not study.config.is_model:
        from mapdyn.study.initial_conditions import prepare_initial_conditions

        prepare_initial_conditions(study, log=say)
    with ensemble_bar(enabled=progress) as bar:
        run_ensemble(study, workers=workers or study.config.ensemble.workers, progress=bar)
    if report:
        write_study_report(study, log=say)
    return load_results(study)
