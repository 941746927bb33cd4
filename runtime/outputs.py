"""Where a subcommand writes: checks made before any work starts (nothing is computed for
an hour and then lost because the output folder cannot be made), and atomic file writes
(a crash or a full disk leaves the old file or none, never half a file)."""
from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import Any

from .errors import InputError


def check_out_folder(path: Path) -> None:
    """`path` must be a folder or creatable as one: not an existing file, not under a file,
    and (for users other than root) under a writable folder. Raises ValueError naming it."""
    path = Path(path)
    if path.exists() and not path.is_dir():
        raise InputError(f"{path}: exists and is not a folder")
    ancestor = path
    while not ancestor.exists():
        ancestor = ancestor.parent
    if not ancestor.is_dir():
        raise InputError(f"{path}: cannot be made, {ancestor} is a file")
    if not os.access(ancestor, os.W_OK | os.X_OK):
        raise InputError(f"{path}: cannot be made, {ancestor} is not writable")


def atomic_write_bytes(path: Path, write: Any) -> None:
    """Call write(file_object) on a temp file in the same folder, fsync, rename over path."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; outputs get the usual permissions
        with os.fdopen(fd, "wb") as f:
            write(f)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException as e:
        if os.path.exists(tmp):
            os.unlink(tmp)
        if isinstance(e, OSError) and e.errno is not None and not e.filename:
            raise OSError(e.errno, os.strerror(e.errno), str(path)) from None  # name the file
        raise
