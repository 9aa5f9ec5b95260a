"""Small file helpers used at the I/O edges: atomic writes."""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path
from typing import Iterator

from .errors import DataFileError


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike, *, suffix: str | None = None) -> Iterator[Path]:
    """Yield a temporary path next to ``path``; rename it onto ``path`` on success.

    If the body raises, the temporary file is removed and ``path`` is left
    untouched, so a crash never leaves a half-written file that looks
    complete.  The directory must exist and be writable.

    Parameters
    ----------
    path : path-like
        Final destination.
    suffix : str, optional
        Suffix of the temporary file (defaults to the suffix of ``path``, so
        libraries that pick a format from the extension still work).
    """
    final = Path(path)
    parent = final.parent if str(final.parent) else Path(".")
    if not parent.is_dir():
        raise DataFileError(f"output directory does not exist: {parent}")
    if not os.access(parent, os.W_OK):
        raise DataFileError(f"output directory is not writable: {parent}")
    sfx = final.suffix if suffix is None else suffix
    fd, tmp = tempfile.mkstemp(prefix=f".{final.stem}.", suffix=f"{sfx}.part{sfx}" if sfx else ".part", dir=parent)
    os.close(fd)
    tmp_path = Path(tmp)
    # mkstemp creates 0600 files; give results the usual permissions (0666 & ~umask).
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp_path, 0o666 & ~umask)
    try:
        yield tmp_path
        os.replace(tmp_path, final)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp_path.unlink()
        raise
