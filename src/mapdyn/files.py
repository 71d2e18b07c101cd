"""Atomic file writes: every file mapdyn writes appears whole or not at all.

The pattern (common practice on POSIX file systems): write ``<name>.<pid>.tmp``, fsync it,
``os.replace`` it onto ``<name>`` and fsync the directory, so a reader never sees a half-written
file and a crash leaves at most a temporary file behind (removed by the next writer).
"""

from __future__ import annotations

import contextlib
import json
import os
from typing import IO, Any, Callable, Iterator

__all__ = ["atomic_open", "atomic_write", "atomic_write_text", "atomic_write_bytes", "write_json", "read_json",
           "fsync_directory"]


def fsync_directory(path: str) -> None:
    """fsync a directory so a rename inside it survives a power cut (POSIX; no-op elsewhere)."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def atomic_write(path: str | os.PathLike, write: Callable[[str], None], sync_directory: bool = True) -> str:
    """Call ``write(tmp_path)``, fsync the temporary file, ``os.replace`` it onto ``path``, fsync
    the directory (skip that with ``sync_directory=False`` when a later write in the same
    directory syncs it anyway).  Returns ``path``."""
    path = os.fspath(path)
    tmp = f"{path}.{os.getpid()}.tmp"  # unique per process: two writers never share a temporary
    try:
        write(tmp)
        fd = os.open(tmp, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    if sync_directory:
        fsync_directory(os.path.dirname(os.path.abspath(path)))
    return path


@contextlib.contextmanager
def atomic_open(path: str | os.PathLike, mode: str = "w", **kwargs: Any) -> Iterator[IO]:
    """``with atomic_open(path, "wb") as fh: ...`` — the file appears at ``path`` only when the
    block finishes without an exception (temporary, fsync, ``os.replace``, directory fsync)."""
    path = os.fspath(path)
    tmp = f"{path}.{os.getpid()}.tmp"
    try:
        with open(tmp, mode, **kwargs) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    fsync_directory(os.path.dirname(os.path.abspath(path)))


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> str:
    """Write ``data`` to ``path`` atomically."""
    with atomic_open(path, "wb") as fh:
        fh.write(data)
    return os.fspath(path)


def atomic_write_text(path: str | os.PathLike, text: str) -> str:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    return atomic_write_bytes(path, text.encode("utf-8"))


def write_json(path: str | os.PathLike, obj: Any) -> str:
    """Write ``obj`` as indented JSON atomically."""
    return atomic_write_text(path, json.dumps(obj, indent=1, sort_keys=True))


def read_json(path: str | os.PathLike) -> Any:
    """Read a JSON file."""
    with open(path, encoding="utf-8") as fh:
        return json.load(fh)
