"""The ``mapdyn`` command line (also ``python -m mapdyn``).

Exit codes: 0 success; 1 the run finished with failed trajectories, or an internal error (a bug:
set MAPDYN_TRACEBACK=1 for the traceback); 2 invalid input or an environment fault (unwritable or
blocked path, full disk, damaged or edited study files, folder in use) — one line on stderr, nothing
written for invalid input; 3 a report was written from incomplete data (missing or damaged
trajectories are listed; ``--allow-incomplete`` accepts that with exit 0); 130 stopped by Ctrl-C
(resume later with ``mapdyn resume``).
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
from mapdyn.logs import LOG_FILE, add_study_log, close_study_logs, configure_console
from mapdyn.study.cluster import ClusterError

__all__ = ["main", "build_parser"]

_EPILOG = """\
examples:
  mapdyn prepare inputs/methaniminium_demo.toml  initial conditions, absorption spectrum and initial
                                             states only (preparation/); a later run reuses them
  mapdyn run inputs/model_tully1.toml        run a study from its input file (creates its folder)
  mapdyn status runs/model_tully1            what is finished, running, failed or pending
  mapdyn resume runs/model_tully1            continue after Ctrl-C, a crash or a reboot
  mapdyn extend runs/model_tully1 --trajectories 400 --duration "3000 au"
  mapdyn analyze runs/model_tully1           (re)write the report folder
  mapdyn show runs/model_tully1 --trajectory 7   one trajectory: energies, states, gap, drift, warnings
  mapdyn show runs/model_tully1 --all        contact sheet of every trajectory (spot outliers)
  mapdyn check inputs/methaniminium_demo.toml  preflight: finite-difference checks and core-hours
  mapdyn validate --quick                    the method's accuracy on built-in exact benchmarks

exit codes: 0 done; 1 failed trajectories or an internal error; 2 invalid input or an environment
fault (one line, nothing computed); 3 report from incomplete data (see --allow-incomplete); 130 Ctrl-C.

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
        sp.add_argument("--allow-incomplete", action="store_true",
                        help="exit 0 even when the report lacks missing or damaged trajectories (listed in it)")
        sp.add_argument("--force", action="store_true", help="run a study above the size limits")

    r = sub.add_parser("run", help="run a study from a TOML input file",
                       description="Validate STUDY.toml, create its folder, prepare initial conditions (optimise, "
                                   "Hessian, Wigner sampling), run all trajectories and write the report. "
                                   "Running the same file again continues where it stopped.")
    r.add_argument("study", metavar="STUDY.toml", help="study input file")
    r.add_argument("--output", metavar="DIR", help="study folder (default: study.folder, else runs/<name>)")
    common_run(r)

    pr = sub.add_parser("prepare", help="initial conditions, absorption spectrum and initial states, no trajectories",
                        description="Create the study folder, optimise the ground state, compute normal modes, "
                                    "Wigner-sample every trajectory, compute the excited states at every sampled "
                                    "geometry and write DIR/preparation/ (absorption_spectrum.png/.csv, "
                                    "initial_states.csv, summary.txt); then stop. 'mapdyn run' on the same input "
                                    "or folder reuses these initial conditions. Molecular studies only.")
    pr.add_argument("study", metavar="STUDY.toml", help="study input file")
    pr.add_argument("--output", metavar="DIR", help="study folder (default: study.folder, else runs/<name>)")
    pr.add_argument("--force", action="store_true", help="prepare a study above the size limits")

    s = sub.add_parser("resume", help="continue an interrupted study",
                       description="Continue every unfinished trajectory from its last good checkpoint.")
    s.add_argument("folder", metavar="DIR", help="study folder")
    s.add_argument("--retry-failed", action="store_true", help="also re-run failed trajectories")
    common_run(s)

    st = sub.add_parser("status", help="show what is finished, running, failed or pending",
                        description="Status derived from the files of the study folder.")
    st.add_argument("folder", metavar="DIR", help="study folder")
    st.add_argument("--json", action="store_true", help="machine-readable output")
    st.add_argument("--quick", action="store_true",
                    help="metadata only: skip verifying every checksum and digest (damage may go unseen)")

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
    a.add_argument("--allow-incomplete", action="store_true",
                   help="exit 0 even when trajectories are missing or damaged (they are listed in the report)")

    sh = sub.add_parser("show", help="inspect one trajectory, or a contact sheet of all (figure + CSV)",
                        description="Draw one trajectory of a study (state energies with the occupied window or "
                                    "populations, S1-S0 gap, energy drift, the [analysis] observables, transfers) "
                                    "and print its flags and warnings; or, with --all, one small panel per "
                                    "trajectory. Files go to DIR/report/show/ (or --output); works on running studies.")
    sh.add_argument("folder", metavar="DIR", help="study folder")
    which = sh.add_mutually_exclusive_group(required=True)
    which.add_argument("--trajectory", type=int, metavar="N", help="study index of the trajectory")
    which.add_argument("--all", action="store_true", help="contact sheet of the whole ensemble")
    sh.add_argument("--output", metavar="OUT", help="folder for the files (default DIR/report/show)")

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
    from mapdyn.study.initial_conditions import prepare_initial_conditions
    from mapdyn.study.runner import run_ensemble

    cfg = study.config
    study.check_layout()
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
    code = 1 if counts["failed"] else 0
    lost = [r for r in summary.results if r.reason.startswith("worker lost")]
    if lost:
        _log(f"{len(lost)} task(s) lost their worker, e.g. {lost[0].kind} {lost[0].index}: {lost[0].reason}")
    if not status.complete:
        _log(f"incomplete: {counts['pending'] + counts['damaged'] + counts['running']} trajectories not computed; "
             f"continue with: mapdyn resume {study.folder}")
        code = code or 1
    if not args.no_analysis:
        rc = _report(study, args.allow_incomplete)
        code = code or rc
    return code


def _report(study, allow_incomplete: bool) -> int:
    """Write the report; list what is missing or damaged (in the summary and on stderr).
    Returns 0, 3 (incomplete without ``--allow-incomplete``) or 1 (no report)."""
    from mapdyn.study.analyze import write_study_report
    from mapdyn.study.folder import StudyError

    missing = study.status().incomplete()
    for line in missing[:20]:
        _log(f"incomplete: {line}")
    if len(missing) > 20:
        _log(f"incomplete: ... and {len(missing) - 20} more (see the report summary)")
    try:
        out = write_study_report(study, log=_log)
    except StudyError as err:
        _log(f"report not written: {err}")
        return 1
    except (OSError, MemoryError):
        raise
    except Exception as err:  # the run itself succeeded; say why the report did not
        _log(f"report not written: {type(err).__name__}: {err}")
        return 1
    if out is None:
        return _error("the analysis modules are not available", 1)
    if missing:
        _append_missing(out, missing)
    _log(f"report written to {out}" + (f" from incomplete data ({len(missing)} item(s) missing or damaged)"
                                       if missing else ""))
    return 3 if missing and not allow_incomplete else 0


def _append_missing(report_folder: str, missing: list) -> None:
    import os

    from mapdyn.files import atomic_write_text

    path = os.path.join(report_folder, "summary.md")
    text = open(path, encoding="utf-8").read() if os.path.exists(path) else ""
    text += ("\n\n## Missing or damaged data\n\nThis report was built WITHOUT the following "
             "(resume the study to compute them):\n\n" + "\n".join(f"- {m}" for m in missing) + "\n")
    atomic_write_text(path, text)


def _cmd_run(args) -> int:
    from mapdyn.study.config import load_study_config
    from mapdyn.study.folder import Study
    from mapdyn.study.integrity import StudyLock

    cfg = load_study_config(args.study)
    if args.workers is not None and args.workers < 1:
        return _error(f"--workers = {args.workers}: must be >= 1")
    folder = _study_folder(cfg, args)
    with StudyLock(folder, "mapdyn run"):
        study = Study.create(cfg, folder)
        _clean(study)
        return _execute(study, args)


def _cmd_prepare(args) -> int:
    from mapdyn.study.config import load_study_config
    from mapdyn.study.folder import Study, StudyError
    from mapdyn.study.integrity import StudyLock
    from mapdyn.study.prepare import prepare_study

    cfg = load_study_config(args.study)
    if cfg.is_model:
        raise StudyError("prepare applies to molecular studies; a model study samples its initial conditions inside "
                         "each task (nothing to prepare): use 'mapdyn run'")
    folder = _study_folder(cfg, args)
    with StudyLock(folder, "mapdyn prepare"):
        study = Study.create(cfg, folder)
        _clean(study)
        study.check_layout()
        add_study_log(study.folder)
        prep = prepare_study(study, log=_log)
    print("\n".join(prep.lines))
    return 0


def _study_folder(cfg, args) -> str:
    """The study's folder (``--output`` or the input's), created after the input passed the size
    limits and the folder was found writable."""
    from mapdyn.study.feasibility import validate_study

    validate_study(cfg, force=args.force)
    folder = os.path.abspath(args.output or cfg.folder)
    _check_writable(folder)
    os.makedirs(folder, exist_ok=True)
    return folder


def _check_writable(folder: str) -> None:
    """One-line refusal when ``folder`` cannot be created or written (checked before writing)."""
    import os

    from mapdyn.study.folder import StudyError

    probe = folder
    while not os.path.exists(probe):
        parent = os.path.dirname(probe)
        if parent == probe:
            break
        probe = parent
    if not os.path.isdir(probe):
        raise StudyError(f"cannot create {folder}: {probe} is a file, not a folder")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise StudyError(f"cannot write {folder}: no write permission in {probe}")


def _clean(study) -> None:
    from mapdyn.study.integrity import remove_temporaries

    removed = remove_temporaries(study.folder)
    if removed:
        _log(f"removed {len(removed)} temporary file(s) left by an interrupted write")


def _open_study(folder: str):
    from mapdyn.study.folder import Study

    return Study(folder)


def _cmd_resume(args) -> int:
    from mapdyn.study.integrity import StudyLock

    study = _open_study(args.folder)
    _ = study.config  # parses the stored input (refuses a damaged one)
    with StudyLock(study.folder, "mapdyn resume"):
        _clean(study)
        return _execute(study, args)


def _cmd_status(args) -> int:
    from mapdyn.study.folder import StudyError

    try:
        study = _open_study(args.folder)
        status = study.status(verify=not getattr(args, "quick", False))
    except StudyError as err:
        return _error(str(err))
    from mapdyn.study.batch_jobs import jobs_report, jobs_text

    jobs = jobs_report(study)
    if getattr(args, "json", False):
        out = status.as_dict()
        if jobs is not None:
            out["batch_jobs"] = jobs
        print(json.dumps(out, indent=1))
    else:
        print(status.text() + (("\n" + jobs_text(jobs)) if jobs is not None else ""))
    return 0


def _cmd_extend(args) -> int:
    from mapdyn.study.config import ConfigError, parse_duration

    if args.trajectories is None and args.duration is None:
        return _error("extend needs --trajectories N and/or --duration TIME")
    from mapdyn.study.feasibility import check_size
    from mapdyn.study.integrity import StudyLock

    study = _open_study(args.folder)
    duration = parse_duration(args.duration, "--duration") if args.duration is not None else None
    if args.trajectories is not None and args.trajectories < 1:
        raise ConfigError("--trajectories", f"= {args.trajectories}: must be >= 1")
    with StudyLock(study.folder, "mapdyn extend"):
        _clean(study)
        n_new = max(args.trajectories or 0, study.ntraj)
        steps = study.config.with_overrides(duration_au=duration).dynamics.nsteps if duration else study.nsteps
        check_size(n_new, steps, study.config.is_model, args.force)
        changes = study.extend(args.trajectories, duration)
        if not changes:
            _log("nothing to extend (the study already has that many trajectories and that end time)")
        else:
            _log("extended: " + ", ".join(f"{k} {v[0]:g} -> {v[1]:g}" for k, v in changes.items()))
        if args.no_run:
            return 0
        return _execute(study, args)


def _cmd_analyze(args) -> int:
    from mapdyn.study.integrity import StudyLock

    study = _open_study(args.folder)
    with StudyLock(study.folder, "mapdyn analyze"):
        _clean(study)
        add_study_log(study.folder)
        rc = _report(study, args.allow_incomplete)
    return rc if rc != 1 else 2  # nothing to report from is a property of the folder, not a bug


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


def _cmd_show(args) -> int:
    from mapdyn.study.show import show_ensemble, show_trajectory

    study = _open_study(args.folder)
    if args.all:
        paths, lines = show_ensemble(study, args.output)
    else:
        paths, lines = show_trajectory(study, args.trajectory, args.output)
    print("\n".join(lines))
    print("wrote " + ", ".join(paths))
    return 0


def _cmd_check(args) -> int:
    from mapdyn.study.config import ConfigError, load_study_config
    from mapdyn.study.feasibility import check_analysis, check_electronic

    try:
        cfg = load_study_config(args.study)
        check_analysis(cfg)
        check_electronic(cfg)  # infeasible settings are refused before the backend runs
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
    finally:
        close_study_logs()


def _main(argv: Sequence[str] | None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    handler = {"run": _cmd_run, "prepare": _cmd_prepare, "resume": _cmd_resume, "status": _cmd_status,
               "extend": _cmd_extend, "analyze": _cmd_analyze, "show": _cmd_show, "export": _cmd_export, "check": _cmd_check,
               "validate": _cmd_validate}[args.command]
    configure_console()  # --quiet only drops the progress bar; messages and warnings stay
    warnings.formatwarning = lambda message, category, *a, **k: f"mapdyn: {category.__name__}: {message}\n"
    code = _guarded(handler, args)
    sys.stdout.flush()
    return code


def _guarded(handler, args) -> int:
    """Run a command; user and environment faults become one line and exit 2, bugs exit 1."""
    import errno
    import os
    import traceback

    from mapdyn.study.checkpoint import CheckpointError
    from mapdyn.study.config import ConfigError
    from mapdyn.study.folder import StudyError
    from mapdyn.study.integrity import LockedError, disk_full_message, is_disk_full

    try:
        return handler(args)
    except (ConfigError, StudyError, LockedError) as err:
        return _error(str(err))
    except CheckpointError as err:
        return _error(f"{err.path} is damaged ({err.reason})")
    except BrokenPipeError:  # the reader left (`mapdyn status | head`): handled by main
        raise
    except OSError as err:
        path = err.filename or ""
        if is_disk_full(err):
            return _error(disk_full_message(path or getattr(args, "folder", None) or getattr(args, "output", "") or ".",
                                            getattr(err, "needed_bytes", None)))
        if err.errno in (errno.EACCES, errno.EPERM, errno.EROFS, errno.ENOTDIR, errno.EISDIR, errno.ENOENT,
                         errno.EEXIST, errno.EDQUOT, errno.ENAMETOOLONG):
            return _error(f"{path or 'a file'}: {os.strerror(err.errno)}")
        if os.environ.get("MAPDYN_TRACEBACK"):
            traceback.print_exc()
        return _error(f"{type(err).__name__}: {err}", 2)
    except MemoryError:
        return _error("out of memory; reduce ensemble.batch, ensemble.workers or the study size")
    except KeyboardInterrupt:
        return 130
    except Exception as err:  # a bug: one line, the traceback on request
        if os.environ.get("MAPDYN_TRACEBACK"):
            traceback.print_exc()
        first = str(err).splitlines()[0] if str(err) else ""
        return _error(f"internal error ({type(err).__name__}: {first}); set MAPDYN_TRACEBACK=1 for the traceback "
                      f"and report it", 1)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
