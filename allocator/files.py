"""Writing output files safely: whole or not at all, never over an input.

:func:`check_output_path` is the one check of an output path (not an input, in a folder
that exists); commands call it for every output before any work is done, and
:func:`atomic_write` calls it again just before writing.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterable
from pathlib import Path

from .errors import UsageError

__all__ = ["atomic_write", "check_output_path"]


def check_output_path(
    path: str | os.PathLike,
    *,
    protect: Iterable[str | os.PathLike | None] = (),
    input_name: str = "input file",
) -> Path:
    """Refuse (UsageError) an output ``path`` that is one of the inputs or whose folder is missing.

    Parameters
    ----------
    path : str or pathlib.Path
        The output file; messages show it as given.
    protect : iterable of str or pathlib.Path or None
        Input files never to overwrite (None entries are skipped). Paths are compared
        after resolving, so a symlink or ``sub/..`` to an input is caught too.
    input_name : str
        What the message calls a protected file: ``"<path>: refusing to overwrite the
        <input_name>"``.

    Returns
    -------
    pathlib.Path
        ``Path(path)``.

    Examples
    --------
    >>> check_output_path("case.toml", protect=["case.toml"], input_name="input case file")
    Traceback (most recent call last):
    ...
    allocator.errors.UsageError: case.toml: refusing to overwrite the input case file
    """
    target = Path(path)
    for p in protect:
        if p is not None and target.resolve() == Path(p).resolve():
            raise UsageError(f"{path}: refusing to overwrite the {input_name}")
    if not target.parent.exists():
        raise UsageError(f"{path}: folder {target.parent} does not exist")
    return target


def atomic_write(
    path: str | os.PathLike, data: bytes | str, *, protect: Iterable[str | os.PathLike | None] = ()
) -> Path:
    """Write ``data`` to ``path`` via a temporary file in the same folder and ``os.replace``.

    Refuses (UsageError) to overwrite any path in ``protect`` (e.g. the input case) and to
    write into a folder that does not exist; a failed write (e.g. a full disk) leaves no
    partial file and no temporary behind, keeps any previous file, and becomes a one-line
    UsageError naming the target.
    """
    target = check_output_path(Path(path), protect=protect)
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
