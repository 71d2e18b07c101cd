"""What the PySCF backends share: thread pinning, the lock and version guard around the places
where mapdyn swaps PySCF module attributes (docs/architecture.md#pyscf-response-interception).

The one-pass SA-CASSCF response and the checked TDDFT Z-vector solve replace attributes of PySCF
modules while they run.  That is safe only (a) one swap at a time per process — every swap holds
:data:`PATCH_LOCK` — (b) with the original attributes restored however the block ends, and (c)
on PySCF releases whose internals were tested (:data:`TESTED_PYSCF`, the range declared as the
dependency in ``pyproject.toml``); on any other release the backends take PySCF's plain gradient
calls instead and say so once.
"""

from __future__ import annotations

import contextlib
import re
import threading
import warnings
from typing import Any, Iterator

#: PySCF releases whose response internals were tested: (lowest included, first excluded).
TESTED_PYSCF: tuple[tuple[int, int], tuple[int, int]] = ((2, 6), (2, 15))

#: Held while any PySCF module attribute is swapped (re-entrant: nested swaps in one thread).
PATCH_LOCK = threading.RLock()

_warned: set[str] = set()


def pin_threads(n: int = 1) -> None:
    """Pin PySCF's OpenMP pool to ``n`` threads (one trajectory per core is the policy:
    docs/architecture.md#threads-and-processes)."""
    from pyscf import lib

    lib.num_threads(n)


def _major_minor(version: str) -> tuple[int, int]:
    m = re.match(r"(\d+)\.(\d+)", version)
    if not m:
        raise ValueError(f"cannot read a PySCF version from {version!r}")
    return int(m.group(1)), int(m.group(2))


def pyscf_version() -> str:
    """The installed PySCF version string."""
    import pyscf

    return str(pyscf.__version__)


def response_interception_allowed(version: str | None = None) -> bool:
    """True when the PySCF ``version`` (default: the installed one) lies in :data:`TESTED_PYSCF`;
    otherwise warn once and return False so the caller takes PySCF's plain path."""
    version = pyscf_version() if version is None else version
    low, high = TESTED_PYSCF
    if low <= _major_minor(version) < high:
        return True
    if version not in _warned:
        _warned.add(version)
        warnings.warn(f"PySCF {version} is outside the tested range {low[0]}.{low[1]} to before "
                      f"{high[0]}.{high[1]}: using PySCF's plain gradient and response calls "
                      "(slower, same equations)", RuntimeWarning, stacklevel=2)
    return False


@contextlib.contextmanager
def swapped(*triples: tuple[Any, str, Any]) -> Iterator[None]:
    """``with swapped((module, "name", replacement), ...):`` — set the attributes under
    :data:`PATCH_LOCK` and restore every original on exit, also after an exception."""
    with PATCH_LOCK:
        saved = [(obj, name, getattr(obj, name)) for obj, name, _ in triples]
        try:
            for obj, name, value in triples:
                setattr(obj, name, value)
            yield
        finally:
            for obj, name, value in reversed(saved):
                setattr(obj, name, value)
