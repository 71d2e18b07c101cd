"""Progress bars (tqdm) for the ensemble, initial conditions and validation.

Bars appear only on a terminal (``tqdm(disable=None)``); elsewhere (batch jobs, pipes) the
ensemble's progress goes to the study log every ``log_interval`` seconds instead.
"""

from __future__ import annotations

import contextlib
import logging
import sys
import time
from typing import Any, Iterable, Iterator

__all__ = ["EnsembleBar", "ensemble_bar", "iterate"]

log = logging.getLogger("mapdyn.progress")


class EnsembleBar:
    """Callable for :func:`mapdyn.study.runner.run_ensemble`'s ``progress``: a bar of trajectory-steps
    with done/failed counts; :meth:`close` when finished."""

    def __init__(self, file: Any = None, log_interval: float = 60.0):
        from tqdm import tqdm

        self.file = file or sys.stderr
        self.bar = tqdm(total=0, unit="step", unit_scale=True, desc="ensemble", file=self.file, disable=None,
                        dynamic_ncols=True, leave=True)
        self.log_interval = float(log_interval)
        self._last_log = 0.0

    def __call__(self, p: Any) -> None:
        if not self.bar.disable:
            if self.bar.total != p.total_steps:
                self.bar.total = p.total_steps
            self.bar.n = p.steps
            self.bar.set_postfix_str(f"trajectories {p.done + p.failed}/{p.total}, failed {p.failed}"
                                     + (", stopping" if p.interrupted else ""), refresh=False)
            self.bar.refresh()
        now = time.monotonic()
        if now - self._last_log >= self.log_interval or p.done + p.failed == p.total:
            self._last_log = now
            log.info(p.line())

    def close(self) -> None:
        self.bar.close()


@contextlib.contextmanager
def ensemble_bar(enabled: bool = True, file: Any = None) -> Iterator[EnsembleBar | None]:
    """An :class:`EnsembleBar` (None when not ``enabled``), closed on exit."""
    if not enabled:
        yield None
        return
    bar = EnsembleBar(file)
    try:
        yield bar
    finally:
        bar.close()


def iterate(items: Iterable, desc: str, total: int | None = None, enabled: bool = True, file: Any = None) -> Iterable:
    """``items`` wrapped in a tqdm bar on a terminal (plain iteration elsewhere or when not ``enabled``)."""
    if not enabled:
        return items
    from tqdm import tqdm

    return tqdm(items, desc=desc, total=total, file=file or sys.stderr, disable=None, dynamic_ncols=True, leave=False)
