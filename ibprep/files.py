"""Writing files so that a failure never leaves a half-written file or destroys an existing one.

Every file ibprep writes goes through :func:`atomic_write`: the content is written to a
temporary file in the destination's folder, flushed to disk, and renamed over the
destination in one step (``os.replace``).
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

from .errors import InputError

__all__ = ["atomic_write"]


def atomic_write(path, write) -> Path:
    """Write a file through ``write(tmp_path)`` into a temporary sibling, then rename it over ``path``.

    Parameters
    ----------
    path : str or os.PathLike — the destination.
    write : callable — called with the temporary file's path (str, same suffix as
        ``path``); must create that file.

    Returns
    -------
    Path — the destination.

    Raises
    ------
    InputError
        The folder does not exist or cannot be written. Whatever ``write`` raises
        is re-raised after the temporary file is removed; ``path`` is untouched.
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise InputError(f"cannot write {str(path)!r}: folder {str(folder)!r} does not exist; create it first")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part" + path.suffix, dir=folder)
    except OSError as exc:
        raise InputError(f"cannot write in folder {str(folder)!r}: {exc.strerror}") from None
    os.close(fd)
    try:
        write(tmp)
        with open(tmp, "rb+") as fh:  # the content is on disk before the rename makes it visible
            os.fsync(fh.fileno())
        # mkstemp makes the file private (0600); give it the mode a plain open() would have:
        # the existing file's, or 0666 less the umask.
        os.chmod(tmp, path.stat().st_mode & 0o7777 if path.exists() else 0o666 & ~_umask())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    return path


def _umask() -> int:
    """The process's file-creation mask (read by setting and restoring it)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask
