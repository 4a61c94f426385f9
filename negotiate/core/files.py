"""Writing a file whole or not at all, without following a link someone placed in the folder.

Every file a run writes goes through :func:`write_atomic`: the content goes to a new temporary file in the
same folder, created with ``O_CREAT | O_EXCL`` (and ``O_NOFOLLOW`` where the system has it), so that a
symbolic link or file already sitting at the temporary name can never redirect the write; then
:func:`os.replace` renames it over the target. A rename replaces a link at the target itself, never the
file it points to, so the write stays in the folder. The rename is atomic on POSIX and Windows: a reader
sees the old file or the new one, never a mix.
"""

from __future__ import annotations

import os
import secrets
from pathlib import Path

__all__ = ["write_atomic"]

_FLAGS = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_BINARY", 0)


def _fsync_folder(folder: Path) -> None:
    """Make a rename in ``folder`` durable (POSIX; a no-op where folders cannot be opened)."""
    try:
        fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def write_atomic(path: str | Path, data: bytes | str, *, durable: bool = False) -> Path:
    """Write ``data`` (text as UTF-8) to ``path`` through a fresh temporary file and :func:`os.replace`.

    With ``durable``, the file and the rename are also flushed to the disk (``fsync``) before returning.
    The temporary file is removed if anything fails. Raises :class:`OSError` as the system reports it.
    """
    path = Path(path)
    if isinstance(data, str):
        data = data.encode("utf-8")
    for _ in range(100):
        tmp = path.with_name(f".{path.name}.{os.getpid()}.{secrets.token_hex(4)}.tmp")
        try:
            fd = os.open(tmp, _FLAGS, 0o666)  # the process's umask applies, as for any new file
            break
        except FileExistsError:
            continue
    else:  # pragma: no cover - 100 collisions of 32 random bits
        raise FileExistsError(f"{path.parent}: cannot create a temporary file for {path.name}")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            if durable:
                fh.flush()
                os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    if durable:
        _fsync_folder(path.parent)
    return path
