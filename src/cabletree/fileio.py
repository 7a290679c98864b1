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

__all__ = ["write_atomically", "TEMPORARY_SUFFIX", "remove_stale_temporaries"]

#: Suffix of the temporary files (left behind only if the process is killed mid-write).
TEMPORARY_SUFFIX = ".tmp"


def remove_stale_temporaries(folder: str | os.PathLike) -> int:
    """Delete temporary files that a killed writer left in ``folder``; return how many."""
    n = 0
    for p in Path(folder).glob(f".*{TEMPORARY_SUFFIX}"):
        p.unlink(missing_ok=True)
        n += 1
    return n


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
        Writes the whole content to the path it is given: a hidden name beside
        ``path`` ending in ``.tmp`` (so a folder scan for ``*.nc`` or ``*.csv`` never
        sees an unfinished file; writers must not infer the format from the suffix).

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
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=TEMPORARY_SUFFIX, dir=folder)
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
