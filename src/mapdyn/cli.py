"""The ``mapdyn`` command line (also ``python -m mapdyn``).

Exit codes: 0 success; 1 the run finished with failed trajectories or could not proceed;
2 invalid input (nothing written); 130 stopped by Ctrl-C (resume later with ``mapdyn resume``).
"""

from __future__ import annotations

import argparse
import json
import signal
import sys
import time
from typing import Sequence

from mapdyn import __version__
from mapdyn.study.cluster import ClusterError

__all__ = ["main", "build_parser"]

_EPILOG = """\
examples:
  mapdyn run inputs/model_tully1.toml        run a study from its input file (creates its folder)
  mapdyn status runs/model_tully1            what is finished, running, failed or pending
  mapdyn resume runs/model_tully1            continue after Ctrl-C, a crash or a reboot
  mapdyn extend runs/model_tully1 --trajectories 400 --duration "3000 au"
  mapdyn analyze runs/model_tully1           (re)write the report folder
  mapdyn check inputs/ethylene_tiny.toml     preflight: finite-difference checks and core-hours
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
    if quiet:
        return None
    tty = sys.stderr.isatty()
    state = {"last": 0.0}

    def show(p):
        now = time.monotonic()
        if tty:
            print("\r" + p.line().ljust(100), end="", file=sys.stderr, flush=True)
        elif now - state["last"] >= 10.0 or p.done + p.failed == p.total:
            state["last"] = now
            print(p.line(), file=sys.stderr, flush=True)

    return show


def _executor(args, config):
    if getattr(args, "scheduler", None) or config.cluster:
        from mapdyn.study.cluster import cluster_executor

        return cluster_executor(config.cluster, scheduler=args.scheduler)
    return None


def _log(msg: str) -> None:
    print(f"mapdyn: {msg}", file=sys.stderr, flush=True)


def _execute(study, args) -> int:
    """Initial conditions (molecules), the ensemble, the report."""
    from mapdyn.study.analyze import write_study_report
    from mapdyn.study.initial_conditions import prepare_initial_conditions
    from mapdyn.study.runner import run_ensemble

    cfg = study.config
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
        recorder = None
        if executor is not None and getattr(executor, "system", None) in ("slurm", "pbs"):
            from mapdyn.study.batch_jobs import JobRecorder

            recorder = JobRecorder(study.folder, executor.system, executor.description)
            executor.add_job_listener(recorder)
        try:
            summary = run_ensemble(study, executor, None if executor is not None else workers,
                                   retry_failed=getattr(args, "retry_failed", False), progress=progress,
                                   stop=lambda: stopper.requested)
        finally:
            if executor is not None:
                executor.shutdown()
            if recorder is not None:
                recorder.close()
        if progress is not None and sys.stderr.isatty():
            print(file=sys.stderr)
    except KeyboardInterrupt:
        _log(f"aborted; continue with: mapdyn resume {study.folder}")
        return 130
    finally:
        signal.signal(signal.SIGINT, old)
    status = study.status()
    counts = status.counts()
    _log(f"finished {counts['finished']}, failed {counts['failed']}, pending {counts['pending']} "
         f"({summary.steps} steps computed in {summary.seconds:.1f} s)")
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
    from mapdyn.study.batch_jobs import jobs_report, jobs_text

    jobs = jobs_report(study)
    if args.json:
        out = status.as_dict()
        if jobs is not None:
            out["batch_jobs"] = jobs
        print(json.dumps(out, indent=1))
    else:
        print(status.text() + (("\n" + jobs_text(jobs)) if jobs is not None else ""))
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
        out = write_study_report(study, log=_log)
    except StudyError as err:
        return _error(str(err), 1)
    if out is None:
        return _error("the analysis modules are not available", 1)
    _log(f"report written to {out}")
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
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    handler = {"run": _cmd_run, "resume": _cmd_resume, "status": _cmd_status, "extend": _cmd_extend,
               "analyze": _cmd_analyze, "check": _cmd_check, "validate": _cmd_validate}[args.command]
    return handler(args)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
