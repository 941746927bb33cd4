"""The show's playlist: which model plays now, crossfades, opening hours, hot reload."""
from __future__ import annotations

import datetime
import logging
import os
import time
from dataclasses import dataclass

from .errors import InputError
from .images import lcm_all
from .model import Model, ModelError, load_model
from .settings import PlayItem

log = logging.getLogger("limner.show")


@dataclass
class Loaded:
    item: PlayItem
    model: Model
    mtime: float


def is_open(hours: list[str], now: datetime.datetime | None = None) -> bool:
    """Opening hours "HH:MM-HH:MM" (a range may pass midnight); none means always open."""
    if not hours:
        return True
    now = now or datetime.datetime.now()
    minutes = now.hour * 60 + now.minute
    for h in hours:
        a, b = h.split("-")
        start = int(a[:2]) * 60 + int(a[3:])
        end = int(b[:2]) * 60 + int(b[3:])
        if (start <= minutes < end) if start <= end else (minutes >= start or minutes < end):
            return True
    return False


class Playlist:
    def __init__(self, items: list[PlayItem], threads: int, crossfade_s: float,
                 max_step: float) -> None:
        if not items:
            raise InputError("the playlist is empty")
        self.threads, self.crossfade_s, self.max_step = threads, crossfade_s, max_step
        self.loaded = [Loaded(i, load_model(i.model, threads), os.path.getmtime(i.model)) for i in items]
        self.index = 0
        self.started = time.monotonic()
        self.fade_from: int | None = None
        self.fade = 1.0  # 1: fully on the current model
        self._last_reload_check = 0.0

    @property
    def current(self) -> Loaded:
        return self.loaded[self.index]

    def size_multiple(self) -> int:
        return lcm_all([entry.model.size_multiple for entry in self.loaded])

    def step(self, delta: int) -> None:
        """Switch to the next (+1) or previous (-1) look, crossfading."""
        if len(self.loaded) < 2:
            return
        self.fade_from = self.index
        self.index = (self.index + delta) % len(self.loaded)
        self.fade = 0.0 if self.crossfade_s > 0 else 1.0
        self.started = time.monotonic()
        log.info("show: now playing %s", os.path.basename(self.current.item.model))

    def tick(self, now: float, frame_dt: float) -> None:
        if now - self.started >= self.current.item.seconds:
            self.step(+1)
        if self.fade < 1.0:
            # the crossfade speed is bounded per frame as well as by crossfade_s
            per_frame = min(self.max_step, frame_dt / self.crossfade_s if self.crossfade_s else 1.0)
            self.fade = min(1.0, self.fade + per_frame)
            if self.fade >= 1.0:
                self.fade_from = None
        if now - self._last_reload_check >= 2.0:
            self._last_reload_check = now
            self._hot_reload()

    def _hot_reload(self) -> None:
        for entry in self.loaded:
            try:
                mtime = os.path.getmtime(entry.item.model)
            except OSError:
                continue  # being replaced: try again later
            if mtime == entry.mtime:
                continue
            entry.mtime = mtime
            try:
                entry.model = load_model(entry.item.model, self.threads)
                log.info("show: reloaded %s", entry.item.model)
            except ModelError as e:
                log.error("show: keeping the running model; new file is bad: %s", e)
