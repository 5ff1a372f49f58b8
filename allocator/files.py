"""Writing output files safely: whole or not at all, never over an input."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

from .errors import UsageError

__all__ = ["atomic_write"]


def atomic_write(path, data: bytes | str, *, protect=()) -> Path:
    """Write ``data`` to ``path`` via a temporary file in the same folder and ``os.replace``.

    Refuses (UsageError) to overwrite any path in ``protect`` (e.g. the input case) and to
    write into a folder that does not exist; a failed write (e.g. a full disk) leaves no
    partial file and no temporary behind, keeps any previous file, and becomes a one-line
    UsageError naming the target.
    """
    target = Path(path)
    for p in protect:
        if p is not None and target.resolve() == Path(p).resolve():
            raise UsageError(f"{target}: refusing to overwrite the input file")
    if not target.parent.exists():
        raise UsageError(f"{target}: folder {target.parent} does not exist")
    mode = "wb" if isinstance(data, bytes) else "w"
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    except OSError as err:
        raise UsageError(f"{target}: cannot write ({(err.strerror or str(err)).lower()})") from err
    try:
        with os.fdopen(fd, mode) as fh:
            fh.write(data)
        # mkstemp creates 0600; give the file the permissions a plain open() would
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        os.replace(tmp, target)
    except BaseException as err:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        if isinstance(err, OSError):  # e.g. disk full: nothing half-written remains
            raise UsageError(f"{target}: cannot write ({(err.strerror or str(err)).lower()})") from err
        raise
    return target
