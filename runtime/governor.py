"""Adaptive resolution: steps along a fixed ladder of input sizes to hold a target fps.

A small fixed ladder keeps onnxruntime's memory flat (every new input shape grows its
arena). Hysteresis: step down when the recent inference rate is below the target for
`patience` frames; step up only when the next size's rate, predicted from the pixel
ratio, would still clear the target with `headroom`, and not within `cooldown_s` of the
last change.
"""
from __future__ import annotations

from collections import deque

from .errors import InputError


class Governor:
    def __init__(self, ladder: list[tuple[int, int]], target_fps: float, *, enabled: bool = True,
                 start: int | None = None, patience: int = 15, headroom: float = 1.15,
                 cooldown_s: float = 3.0) -> None:
        if not ladder:
            raise InputError("the resolution ladder is empty")
        self.ladder = sorted(ladder, key=lambda wh: wh[0] * wh[1])
        self.target, self.enabled = target_fps, enabled
        self.index = len(self.ladder) - 1 if start is None else start
        self.patience, self.headroom, self.cooldown_s = patience, headroom, cooldown_s
        self.times: deque[float] = deque(maxlen=patience)
        self.last_change = -1e9
        self.changes = 0

    @property
    def size(self) -> tuple[int, int]:
        return self.ladder[self.index]

    def observe(self, seconds_per_frame: float, now: float) -> tuple[int, int]:
        """Record one frame's processing time; returns the size to use next."""
        self.times.append(seconds_per_frame)
        if not self.enabled or len(self.times) < self.patience or now - self.last_change < self.cooldown_s:
            return self.size
        fps = len(self.times) / sum(self.times)
        if fps < self.target and self.index > 0:
            self._move(-1, now)
        elif self.index < len(self.ladder) - 1:
            w, h = self.size
            nw, nh = self.ladder[self.index + 1]
            predicted = fps * (w * h) / (nw * nh)
            if predicted >= self.target * self.headroom:
                self._move(+1, now)
        return self.size

    def _move(self, step: int, now: float) -> None:
        self.index += step
        self.last_change = now
        self.changes += 1
        self.times.clear()
