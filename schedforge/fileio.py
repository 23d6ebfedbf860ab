"""Atomic file output: a file is either written completely or not at all.

Every output of schedforge (CSV samples, figures, reports, JSON) goes through
:func:`atomic_write`: the content is written to a temporary file in the target's
folder, flushed and fsync'ed, then moved over the target with :func:`os.replace`
(atomic on POSIX and Windows within one file system).  If anything fails while
writing, the temporary file is removed and the target is left untouched, so a
failed run never leaves a partial output file behind.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import IO, Any

__all__ = [
    "atomic_write",
    "atomic_write_all",
    "atomic_write_bytes",
    "atomic_write_text",
    "writable_folder_problem",
]

_MODES = ("w", "wt", "wb")


@contextlib.contextmanager
def atomic_write(
    path: str | os.PathLike[str],
    mode: str = "w",
    *,
    encoding: str = "utf-8",
    newline: str | None = None,
) -> Iterator[IO[Any]]:
    """Open a temporary file that replaces ``path`` when the block succeeds.

    Parameters
    ----------
    path : str or path-like
        Final destination.  Its folder must exist.
    mode : {"w", "wt", "wb"}
        Text or binary write mode.
    encoding : str
        Text encoding (text modes only).
    newline : str, optional
        Passed to :func:`open` in text modes.

    Yields
    ------
    file object
        Write to it; do not close it yourself.

    Notes
    -----
    On an exception inside the block the temporary file is deleted, the
    exception propagates and ``path`` keeps its previous content (or stays
    absent).  The new file gets the usual permissions of a freshly created file
    (``0o666`` minus the umask), not the restrictive ones of :mod:`tempfile`.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> target = pathlib.Path(tempfile.mkdtemp()) / "out.txt"
    >>> with atomic_write(target) as fh:
    ...     _ = fh.write("done\\n")
    >>> target.read_text()
    'done\\n'
    """
    if mode not in _MODES:
        raise ValueError(f"atomic_write mode must be one of {_MODES}, got {mode!r}")
    target = Path(path)
    folder = target.parent if str(target.parent) else Path(".")
    fd, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=folder)
    tmp = Path(tmp_name)
    try:
        binary = "b" in mode
        with (
            os.fdopen(fd, "wb")
            if binary
            else os.fdopen(fd, "w", encoding=encoding, newline=newline)
        ) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        _set_default_permissions(tmp)
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise


def _set_default_permissions(path: Path) -> None:
    """Give ``path`` the permissions of a normally created file (0o666 & ~umask)."""
    umask = os.umask(0)
    os.umask(umask)
    with contextlib.suppress(OSError):
        os.chmod(path, 0o666 & ~umask)


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes) -> None:
    """Write ``data`` to ``path`` atomically (see :func:`atomic_write`)."""
    with atomic_write(path, "wb") as fh:
        fh.write(data)


def atomic_write_text(path: str | os.PathLike[str], text: str, *, encoding: str = "utf-8") -> None:
    """Write ``text`` to ``path`` atomically (see :func:`atomic_write`)."""
    with atomic_write(path, "w", encoding=encoding) as fh:
        fh.write(text)


def atomic_write_all(
    outputs: Sequence[tuple[str | os.PathLike[str], Callable[[IO[bytes]], None]]],
) -> None:
    """Write several files so that either all of them appear or none does.

    Parameters
    ----------
    outputs : sequence of (path, writer)
        Each ``writer(fh)`` writes the content of ``path`` to a binary file
        object.  Every content is written to a temporary file beside its
        target first; only when all of them succeeded are they renamed over
        their targets.

    Notes
    -----
    A failure while writing any content removes every temporary file and
    leaves every target untouched.  (The renames themselves, within one file
    system, do not fail in practice.)
    """
    temps: list[tuple[Path, Path]] = []
    try:
        for path, writer in outputs:
            target = Path(path)
            folder = target.parent if str(target.parent) else Path(".")
            fd, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=folder)
            tmp = Path(tmp_name)
            temps.append((tmp, target))
            with os.fdopen(fd, "wb") as fh:
                writer(fh)
                fh.flush()
                os.fsync(fh.fileno())
            _set_default_permissions(tmp)
        for tmp, target in temps:
            os.replace(tmp, target)
    except BaseException:
        for tmp, _ in temps:
            with contextlib.suppress(OSError):
                tmp.unlink()
        raise


def writable_folder_problem(folder: str | os.PathLike[str]) -> str | None:
    """Why a file cannot be created in ``folder``, or ``None`` when it can.

    The folder is tested by creating (and removing) an empty temporary file in
    it, which also catches read-only file systems and folders where even the
    super-user cannot write.
    """
    f = Path(folder) if str(folder) else Path(".")
    if not f.exists():
        missing = f
        while not missing.parent.exists() and missing.parent != missing:
            missing = missing.parent
        if missing.parent.exists() and not missing.parent.is_dir():
            return f"{str(missing.parent)!r} is a file, not a folder"
        return f"{str(f)!r} does not exist"
    if not f.is_dir():
        return f"{str(f)!r} is a file, not a folder"
    try:
        fd, name = tempfile.mkstemp(prefix=".schedforge-probe.", dir=f)
    except OSError as exc:
        return f"cannot write in {str(f)!r} ({exc.strerror or exc})"
    os.close(fd)
    with contextlib.suppress(OSError):
        os.unlink(name)
    return None
