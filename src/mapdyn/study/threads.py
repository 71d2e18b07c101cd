"""One thread per trajectory: the single thread policy of local and cluster workers
(docs/architecture.md#threads-and-processes)."""

from __future__ import annotations

import os
import sys

#: Environment of every worker process: one OpenMP/BLAS thread.
SINGLE_THREAD_ENV = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


def use_single_thread() -> None:
    """Set :data:`SINGLE_THREAD_ENV` (reaches libraries initialised later and child processes)
    and pin PySCF's own pool when PySCF is already loaded (backends pin it again themselves)."""
    os.environ.update(SINGLE_THREAD_ENV)
    if "pyscf" in sys.modules:
        from mapdyn.backends.pyscf.common import pin_threads

        pin_threads(1)
