"""Checks on where a subcommand will write, made before any work starts (nothing is
computed for an hour and then lost because the output folder cannot be made)."""
from __future__ import annotations

import os
from pathlib import Path


def check_out_folder(path: Path) -> None:
    """`path` must be a folder or creatable as one: not an existing file, not under a file,
    and (for users other than root) under a writable folder. Raises ValueError naming it."""
    path = Path(path)
    if path.exists() and not path.is_dir():
        raise ValueError(f"{path}: exists and is not a folder")
    ancestor = path
    while not ancestor.exists():
        ancestor = ancestor.parent
    if not ancestor.is_dir():
        raise ValueError(f"{path}: cannot be made, {ancestor} is a file")
    if not os.access(ancestor, os.W_OK | os.X_OK):
        raise ValueError(f"{path}: cannot be made, {ancestor} is not writable")

