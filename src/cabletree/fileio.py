"""Writing files so that a failure never leaves a half-written one.

Every output of cabletree (SWC files, results, states, tables, figures, sweep
stores) goes through :func:`write_atomically`: the content is written to a
temporary file in the destination folder and renamed over the destination only
when complete (a rename within one file system is atomic on POSIX).
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import Callable

__all__ = ["write_atomically"]


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def write_atomically(path: str | os.PathLike, write: Callable[[Path], None]) -> Path:
    """Call ``write(tmp_path)`` on a temporary file beside ``path``, then rename it over ``path``.

    Parameters
    ----------
    path : str or path-like
        Destination file; its folder must exist.
    write : callable
        Writes the whole content to the path it is given.  The temporary name keeps
        the suffix of ``path``, so writers that infer the format from it still work.

    Returns
    -------
    pathlib.Path
        The destination.

    Notes
    -----
    The file gets the usual permissions for new files (0666 less the umask), not the
    private 0600 of a bare temporary file.  On any exception the temporary file is
    removed and the destination is left as it was.
    """
    target = Path(path)
    folder = target.parent if str(target.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(prefix=f".{target.stem}.", suffix=target.suffix, dir=folder)
    os.close(fd)
    try:
        write(Path(tmp))
        os.chmod(tmp, 0o666 & ~_umask())
        os.replace(tmp, target)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return target
