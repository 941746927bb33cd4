"""Running for weeks without anyone watching: rotating logs, a heartbeat file,
snapshots with a retention limit."""
from __future__ import annotations

import logging
import logging.handlers
import os
import time
from pathlib import Path

import numpy as np

from .images import write_image

log = logging.getLogger("limner")


def setup_logging(log_dir: str, max_bytes: int, backups: int) -> None:
    root = logging.getLogger("limner")
    root.setLevel(logging.INFO)
    fmt = logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s")
    if not any(isinstance(h, logging.StreamHandler) for h in root.handlers):
        err = logging.StreamHandler()
        err.setLevel(logging.WARNING)
        err.setFormatter(fmt)
        root.addHandler(err)
    if log_dir:
        Path(log_dir).mkdir(parents=True, exist_ok=True)
        fh = logging.handlers.RotatingFileHandler(Path(log_dir) / "limner.log", maxBytes=max_bytes,
                                                  backupCount=backups)
        fh.setFormatter(fmt)
        root.addHandler(fh)


class Heartbeat:
    """Touches a file at most once a second; a watchdog restarts the show when it goes stale."""

    def __init__(self, path: str) -> None:
        self.path = Path(path) if path else None
        self.last = 0.0
        if self.path:
            self.path.parent.mkdir(parents=True, exist_ok=True)

    def beat(self) -> None:
        if self.path is None:
            return
        now = time.monotonic()
        if now - self.last >= 1.0:
            self.last = now
            self.path.touch()
            os.utime(self.path)


class Snapshots:
    """Sequentially named PNG stills, written atomically, oldest deleted beyond `keep`."""

    def __init__(self, folder: str, keep: int) -> None:
        self.folder = Path(folder) if folder else None
        self.keep = keep
        if self.folder:
            self.folder.mkdir(parents=True, exist_ok=True)

    def _existing(self) -> list[Path]:
        assert self.folder is not None
        return sorted(self.folder.glob("snapshot_*.png"))

    def take(self, img: np.ndarray) -> Path | None:
        if self.folder is None:
            log.warning("snapshot requested but no snapshot folder is set (nothing is stored)")
            return None
        files = self._existing()
        n = int(files[-1].stem.split("_")[1]) + 1 if files else 1
        path = self.folder / f"snapshot_{n:06d}.png"
        try:
            write_image(path, img)
        except OSError as e:  # the show goes on without the snapshot
            log.error("snapshot: cannot write %s: %s", path, e.strerror or e)
            return None
        for old in self._existing()[:-self.keep] if self.keep > 0 else []:
            old.unlink(missing_ok=True)
        log.info("snapshot %s", path)
        return path


def rss_mb() -> float:
    """Current resident set size (Linux /proc; 0 elsewhere)."""
    try:
        with open("/proc/self/statm") as f:
            pages = int(f.read().split()[1])
        return pages * os.sysconf("SC_PAGE_SIZE") / 1e6
    except (OSError, ValueError, IndexError):
        return 0.0
