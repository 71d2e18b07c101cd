"""The ``mapdyn`` command line (also ``python -m mapdyn``).

Exit codes: 0 success; 1 the run finished with failed trajectories or could not proceed;
2 invalid input (nothing written); 130 stopped by Ctrl-C (resume later with ``mapdyn resume``).
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import signal
import sys
import warnings
from typing import Sequence

from mapdyn import __version__
from mapdyn.logs import LOG_FILE, add_study_log, configure_console
from mapdyn.study.cluster import ClusterError

__all__ = ["main", "build_parser"]

_EPILOG = """\
examples:
  mapdyn run inputs/model_tully1.toml        run a study from its input file (creates its folder)
  mapdyn status runs/model_tully1            what is finished, running, failed or pending
  mapdyn resume runs/model_tully1            continue after Ctrl-C, a crash or a reboot
  mapdyn extend runs/model_tully1 --trajectories 400 --duration "3000 au"
  mapdyn analyze runs/model_tully1           (re)write the report folder
  mapdyn check inputs/methaniminium_demo.toml  preflight: finite-difference checks and core-hours
  mapdyn validate --quick                    the method's accuracy on built-in exact benchmarks

A study folder holds everything: the input, initial conditions, checkpoints of every
trajectory and the report.  Work is never repeated: run, resume and extend only compute
what the files show is missing.  Ctrl-C stops after the current checkpoint.
"""


class _Stop:
    """First Ctrl-C: ask for a clean stop after the current checkpoint; second: abort."""

    def __init__(self):
        self.requested = False

    def __call__(self, signum, frame):
        if self.requested:
            raise KeyboardInterrupt
        self.requested = True
        print("\nmapdyn: stopping after the current checkpoint (Ctrl-C again to abort)", file=sys.stderr, flush=True)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="mapdyn",
        description="Nonadiabatic molecular dynamics with classical mapping (MMST) oscillators and SQC windows: "
                    "sample initial conditions, run restartable trajectory ensembles, analyse.",
        epilog=_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--version", action="version", version=f"mapdyn {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    def common_run(sp):
        sp.add_argument("--workers", type=int, metavar="N", help="worker processes (one thread each; default: ensemble.workers)")
        sp.add_argument("--scheduler", metavar="ADDRESS", help="run the tasks on a Dask scheduler, e.g. tcp://10.0.0.5:8786")
        sp.add_argument("--no-analysis", action="store_true", help="do not write the report at the end")
        sp.add_argument("--quiet", action="store_true", help="no progress line")

    r = sub.add_parser("run", help="run a study from a TOML input file",
                       description="Validate STUDY.toml, create its folder, prepare initial conditions (optimise, "
                                   "Hessian, Wigner sampling), run all trajectories and write the report. "
                                   "Running the same file again continues where it stopped.")
    r.add_argument("study", metavar="STUDY.toml", help="study input file")
    r.add_argument("--output", metavar="DIR", help="study folder (default: study.folder, else runs/<name>)")
    common_run(r)

    s = sub.add_parser("resume", help="continue an interrupted study",
                       description="Continue every unfinished trajectory from its last good checkpoint.")
    s.add_argument("folder", metavar="DIR", help="study folder")
    s.add_argument("--retry-failed", action="store_true", help="also re-run failed trajectories")
    common_run(s)

    st = sub.add_parser("status", help="show what is finished, running, failed or pending",
                        description="Status derived from the files of the study folder.")
    st.add_argument("folder", metavar="DIR", help="study folder")
    st.add_argument("--json", action="store_true", help="machine-readable output")

    e = sub.add_parser("extend", help="add trajectories or a later end time, keeping finished work",
                       description="Raise the number of trajectories and/or the end time of a study; finished "
                                   "work is kept and only the missing part is computed (unless --no-run).")
    e.add_argument("folder", metavar="DIR", help="study folder")
    e.add_argument("--trajectories", type=int, metavar="N", help="new total number of trajectories")
    e.add_argument("--duration", metavar="TIME", help='new end time with a unit, e.g. "200 fs" or "3000 au"')
    e.add_argument("--no-run", action="store_true", help="only record the change; compute later with resume")
    common_run(e)

    a = sub.add_parser("analyze", help="write the report folder (figures, CSV, summary)",
                       description="Analyse a finished or partial study and write DIR/report/.")
    a.add_argument("folder", metavar="DIR", help="study folder")

    x = sub.add_parser("export", help="write open formats: extended XYZ per trajectory, CSV, HDF5",
                       description="Write DIR/export/: <index>.xyz per trajectory (ase.io.read(path, index=':') "
                                   "gives every frame with time, energies, populations and window in atoms.info), "
                                   "frames.csv, ensemble.csv and results.h5 (units as attributes). In Python: "
                                   "mapdyn.load_results(DIR) returns the same data as an xarray.Dataset.")
    x.add_argument("folder", metavar="DIR", help="study folder")
    x.add_argument("--output", metavar="OUT", help="export folder (default DIR/export)")
    x.add_argument("--no-xyz", action="store_true", help="only the CSV and HDF5 files")

    c = sub.add_parser("check", help="preflight: backend vs finite differences and estimated cost",
                       description="Run the electronic backend once at the first geometry, compare gradients and "
                                   "couplings with finite differences and estimate the core-hours of the study.")
    c.add_argument("study", metavar="STUDY.toml", help="study input file")

    v = sub.add_parser("validate", help="accuracy table of the method on the built-in exact benchmarks",
                       description="Run Tully models 1-3, the Landau-Zener crossing, two spin-boson cases (HEOM) "
                                   "and, when cached, the real-diatomic case; print exact vs method with "
                                   "standard errors and tolerances. Exit code 0 only if every case passes.")
    from mapdyn.validation.table import add_arguments
    add_arguments(v)
    return p


def _error(msg: str, code: int = 2) -> int:
    print(f"mapdyn: error: {msg}", file=sys.stderr)
    return code


def _progress_printer(quiet: bool):
    """A tqdm bar on a terminal; elsewhere progress lines go to the study log (mapdyn.log)."""
    if quiet:
        return None
    from mapdyn.progress import EnsembleBar

    return EnsembleBar()


def _executor(args, config):
    if getattr(args, "scheduler", None) or config.cluster:
        from mapdyn.study.cluster import cluster_executor

        return cluster_executor(config.cluster, scheduler=args.scheduler)
    return None


_LOG = logging.getLogger("mapdyn.cli")


def _log(msg: str) -> None:
    _LOG.info(msg)


def _execute(study, args) -> int:
    """Initial conditions (molecules), the ensemble, the report."""
    from mapdyn.study.analyze import write_study_report
    from mapdyn.study.initial_conditions import prepare_initial_conditions
    from mapdyn.study.runner import run_ensemble

    cfg = study.config
    add_study_log(study.folder)
    stopper = _Stop()
    old = signal.signal(signal.SIGINT, stopper)
    try:
        if not cfg.is_model:
            prepare_initial_conditions(study, log=_log)
        if stopper.requested:
            _log(f"stopped before the dynamics; continue with: mapdyn resume {study.folder}")
            return 130
        try:
            executor = _executor(args, cfg)
        except (ClusterError, ValueError) as err:
            return _error(str(err), 1)
        kind = "chunks of model trajectories" if study.batched else "trajectories"
        workers = args.workers or cfg.ensemble.workers
        _log(f"running {study.ntraj} trajectories ({kind}) of {study.nsteps} steps on "
             f"{'Dask' if executor is not None else f'{workers} local process(es)'}; folder {study.folder}")
        progress = _progress_printer(args.quiet)
        try:
            summary = run_ensemble(study, executor, None if executor is not None else workers,
                                   retry_failed=getattr(args, "retry_failed", False), progress=progress,
                                   stop=lambda: stopper.requested)
        finally:
            if executor is not None:
                executor.shutdown()
        if progress is not None:
            progress.close()
    except KeyboardInterrupt:
        _log(f"aborted; continue with: mapdyn resume {study.folder}")
        return 130
    finally:
        signal.signal(signal.SIGINT, old)
    status = study.status()
    counts = status.counts()
    _log(f"finished {counts['finished']}, failed {counts['failed']}, pending {counts['pending']} "
         f"({summary.steps} steps computed in {summary.seconds:.1f} s)")
    if status.warning_count:
        n = status.warning_count
        _log(f"{n} warning record{'s' if n != 1 else ''} from the trajectories; see 'mapdyn status', "
             f"report/summary.md and {study.path(LOG_FILE)}")
    if stopper.requested or summary.interrupted:
        _log(f"stopped; continue with: mapdyn resume {study.folder}")
        return 130
    if not args.no_analysis:
        try:
            out = write_study_report(study, log=_log)
            if out:
                _log(f"report written to {out}")
        except Exception as err:  # the run itself succeeded; say why the report did not
            _log(f"report not written: {type(err).__name__}: {err}")
    return 1 if counts["failed"] else 0


def _cmd_run(args) -> int:
    from mapdyn.study.config import ConfigError, load_study_config
    from mapdyn.study.folder import Study, StudyError

    try:
        cfg = load_study_config(args.study)
    except ConfigError as err:
        return _error(str(err))
    if args.workers is not None and args.workers < 1:
        return _error(f"--workers = {args.workers}: must be >= 1")
    try:
        study = Study.create(cfg, args.output)
    except StudyError as err:
        return _error(str(err))
    return _execute(study, args)


def _open_study(folder: str):
    from mapdyn.study.folder import Study

    return Study(folder)


def _cmd_resume(args) -> int:
    from mapdyn.study.config import ConfigError
    from mapdyn.study.folder import StudyError

    try:
        study = _open_study(args.folder)
        _ = study.config  # reads and checks the stored input before any work
    except (StudyError, ConfigError) as err:
        return _error(str(err))
    return _execute(study, args)


def _cmd_status(args) -> int:
    from mapdyn.study.folder import StudyError

    try:
        study = _open_study(args.folder)
        status = study.status()
    except StudyError as err:
        return _error(str(err))
    if args.json:
        print(json.dumps(status.as_dict(), indent=1))
    else:
        print(status.text())
    return 0


def _cmd_extend(args) -> int:
    from mapdyn.study.config import ConfigError, parse_duration
    from mapdyn.study.folder import StudyError

    if args.trajectories is None and args.duration is None:
        return _error("extend needs --trajectories N and/or --duration TIME")
    try:
        study = _open_study(args.folder)
        duration = parse_duration(args.duration, "--duration") if args.duration is not None else None
        if args.trajectories is not None and args.trajectories < 1:
            raise ConfigError("--trajectories", f"= {args.trajectories}: must be >= 1")
        changes = study.extend(args.trajectories, duration)
    except (StudyError, ConfigError) as err:
        return _error(str(err))
    if not changes:
        _log("nothing to extend (the study already has that many trajectories and that end time)")
    else:
        _log("extended: " + ", ".join(f"{k} {v[0]:g} -> {v[1]:g}" for k, v in changes.items()))
    if args.no_run:
        return 0
    return _execute(study, args)


def _cmd_analyze(args) -> int:
    from mapdyn.study.analyze import write_study_report
    from mapdyn.study.folder import StudyError

    try:
        study = _open_study(args.folder)
        add_study_log(study.folder)
        out = write_study_report(study, log=_log)
    except StudyError as err:
        return _error(str(err), 1)
    if out is None:
        return _error("the analysis modules are not available", 1)
    _log(f"report written to {out}")
    return 0


def _cmd_export(args) -> int:
    from mapdyn.study.export import export_study
    from mapdyn.study.folder import StudyError

    try:
        study = _open_study(args.folder)
        out = export_study(study, args.output, xyz=not args.no_xyz)
    except StudyError as err:
        return _error(str(err), 1)
    _log(f"exported {len(out['xyz'])} trajectory XYZ file(s), {os.path.basename(out['frames_csv'])}, "
         f"{os.path.basename(out['ensemble_csv'])} and {os.path.basename(out['h5'])} to {os.path.dirname(out['h5'])}")
    return 0


def _cmd_check(args) -> int:
    from mapdyn.study.config import ConfigError, load_study_config

    try:
        cfg = load_study_config(args.study)
    except ConfigError as err:
        return _error(str(err))
    from mapdyn.study import preflight

    runner = getattr(preflight, "check_study", None)
    if runner is None:
        if cfg.is_model:
            return _error("check applies to molecular studies", 1)
        from mapdyn.study.backend_factory import make_backend

        report = preflight.molecular_preflight(make_backend(cfg), cfg.molecule.positions_bohr,
                                               n_steps=cfg.dynamics.nsteps, n_trajectories=cfg.ensemble.trajectories,
                                               workers=cfg.ensemble.workers, symbols=cfg.molecule.symbols)
    else:
        report = runner(cfg)
    print(report.text())
    return 0 if report.passed else 1


def _cmd_validate(args) -> int:
    from mapdyn.validation.table import main_from_args
    return main_from_args(args)


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``mapdyn`` console script; returns the exit code."""
    try:
        return _main(argv)
    except BrokenPipeError:  # e.g. `mapdyn status --json | head`: the reader left, nothing to report
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 141


def _main(argv: Sequence[str] | None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    handler = {"run": _cmd_run, "resume": _cmd_resume, "status": _cmd_status, "extend": _cmd_extend,
               "analyze": _cmd_analyze, "export": _cmd_export, "check": _cmd_check,
               "validate": _cmd_validate}[args.command]
    configure_console()  # --quiet only drops the progress bar; messages and warnings stay
    warnings.formatwarning = lambda message, category, *a, **k: f"mapdyn: {category.__name__}: {message}\n"
    code = handler(args)
    sys.stdout.flush()
    return code


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
