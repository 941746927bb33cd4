"""A small dependency-free progress bar with ETA for long CPU work."""
from __future__ import annotations

import sys
import time


class Progress:
    def __init__(self, total: int, desc: str, start: int = 0, stream=sys.stderr,
                 min_interval_s: float = 0.5) -> None:
        self.total, self.desc, self.n = total, desc, start
        self.start_n, self.t0, self.last = start, time.monotonic(), 0.0
        self.stream, self.min_interval_s = stream, min_interval_s
        self.postfix = ""
        self.drawn = -1
        if not getattr(stream, "isatty", lambda: False)() and min_interval_s > 0:
            self.min_interval_s = max(min_interval_s, 15.0)  # logs get a line per 15 s

    def update(self, n: int = 1, postfix: str | None = None) -> None:
        self.n += n
        if postfix is not None:
            self.postfix = postfix
        now = time.monotonic()
        if now - self.last >= self.min_interval_s or self.n >= self.total:
            self.last = now
            self._draw(now)

    def _draw(self, now: float) -> None:
        self.drawn = self.n
        done = self.n - self.start_n
        rate = done / max(now - self.t0, 1e-9)
        left = (self.total - self.n) / rate if rate > 0 else float("inf")
        frac = self.n / max(self.total, 1)
        bar = "#" * int(24 * frac) + "-" * (24 - int(24 * frac))
        eta = _fmt(left) if left != float("inf") else "?"
        line = f"{self.desc} [{bar}] {self.n}/{self.total} {rate:.2f}/s ETA {eta} {self.postfix}"
        tty = getattr(self.stream, "isatty", lambda: False)()
        # a terminal redraws one line (erasing what a longer previous text left); a log gets lines
        self.stream.write(f"\r{line}\x1b[K" if tty else line + "\n")
        self.stream.flush()

    def close(self) -> None:
        if self.drawn != self.n:
            self._draw(time.monotonic())
        if getattr(self.stream, "isatty", lambda: False)():
            self.stream.write("\n")


def _fmt(s: float) -> str:
    s = int(s)
    return f"{s // 3600}:{s % 3600 // 60:02d}:{s % 60:02d}"
