"""Logging set-up: ``mapdyn.*`` loggers, a console handler for the command line and a log file
per study folder (``<study>/mapdyn.log``).

Library code only creates loggers (``logging.getLogger(__name__)``); the command line decides
where records go.  The console shows the command line's own INFO messages and WARNING or worse
from everywhere (written through ``tqdm.write`` so progress bars stay intact); the study log
file gets INFO and above from every ``mapdyn`` logger with time stamps.
"""

from __future__ import annotations

import logging
import os
import sys

__all__ = ["LOG_FILE", "configure_console", "add_study_log", "close_study_logs"]

#: Name of the per-study log file.
LOG_FILE = "mapdyn.log"
_ROOT = logging.getLogger("mapdyn")
_ROOT.addHandler(logging.NullHandler())  # a library never prints through logging's last resort


class _ConsoleHandler(logging.Handler):
    """stderr through ``tqdm.write`` (keeps an active progress bar on its own line)."""

    def emit(self, record: logging.LogRecord) -> None:
        try:
            msg = self.format(record)
            try:
                from tqdm import tqdm

                tqdm.write(msg, file=sys.stderr)
            except ImportError:
                print(msg, file=sys.stderr, flush=True)
        except (BrokenPipeError, ValueError):
            pass
        except Exception:  # noqa: BLE001 - logging must never raise
            self.handleError(record)


class _ConsoleFilter(logging.Filter):
    def filter(self, record: logging.LogRecord) -> bool:
        return record.levelno >= logging.WARNING or record.name == "mapdyn.cli"


def configure_console(quiet: bool = False) -> None:
    """Console output for the command line (idempotent); ``quiet`` keeps only warnings and errors."""
    _ROOT.setLevel(logging.INFO)
    for h in _ROOT.handlers:
        if isinstance(h, _ConsoleHandler):
            h.setLevel(logging.WARNING if quiet else logging.INFO)
            return
    h = _ConsoleHandler(logging.WARNING if quiet else logging.INFO)
    h.setFormatter(logging.Formatter("mapdyn: %(message)s"))
    h.addFilter(_ConsoleFilter())
    _ROOT.addHandler(h)


def add_study_log(folder: str | os.PathLike) -> str | None:
    """Append INFO and above of every ``mapdyn`` logger to ``<folder>/mapdyn.log`` (idempotent per
    folder); returns the path, or None when the folder is not writable."""
    path = os.path.abspath(os.path.join(os.fspath(folder), LOG_FILE))
    for h in _ROOT.handlers:
        if isinstance(h, logging.FileHandler) and os.path.abspath(h.baseFilename) == path:
            return path
    try:
        h = logging.FileHandler(path, encoding="utf-8")
    except OSError:
        return None
    h.setLevel(logging.INFO)
    h.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    _ROOT.addHandler(h)
    if _ROOT.level == logging.NOTSET or _ROOT.level > logging.INFO:
        _ROOT.setLevel(logging.INFO)
    return path


def close_study_logs() -> None:
    """Detach and close every study log file (end of a command: no file stays open, so an
    in-process caller can move or unmount the folder)."""
    for h in list(_ROOT.handlers):
        if isinstance(h, logging.FileHandler):
            _ROOT.removeHandler(h)
            h.close()
