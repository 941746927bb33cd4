"""A capture thread that keeps only the newest frame, detects stalls and unplugs,
and reopens the source with exponential backoff.

Cameras and streams drop frames the consumer had no time for (latency stays bounded).
A file or the demo clip played without pacing is lossless instead: each frame waits
until the previous one was taken, so every frame of the clip is processed.

Each connection gets its own reader thread; when frames stop arriving for `stall_s`
the connection is abandoned (its reader exits when its blocked read returns) and a
new one is opened after a backoff delay. A file or clip that ends without looping
ends the capture.
"""
from __future__ import annotations

import logging
import threading
import time
from dataclasses import dataclass
from typing import Callable

import numpy as np

from .images import as_bgr
from .sources import FrameSource

log = logging.getLogger("limner.capture")


@dataclass
class Frame:
    seq: int
    image: np.ndarray
    t: float  # time.monotonic() when captured


class Capture:
    def __init__(self, opener: Callable[[], FrameSource], *, stall_s: float = 3.0,
                 backoff_s: tuple[float, float] = (0.5, 8.0), pace_fps: float = 0.0) -> None:
        self.opener, self.stall_s, self.backoff_s, self.pace_fps = opener, stall_s, backoff_s, pace_fps
        self.cond = threading.Condition()
        self.newest: Frame | None = None
        self.seq = 0
        self.taken = 0            # the newest seq handed to the consumer
        self.state = "starting"  # starting | running | stalled | reconnecting | ended
        self.reconnects = 0
        self.dropped_bad = 0  # frames that were not images the models take (as_bgr)
        self.description = ""
        self._stop = threading.Event()
        self._generation = 0
        self._last_frame_t = time.monotonic()
        self._reader: threading.Thread | None = None
        self._supervisor = threading.Thread(target=self._supervise, name="capture-supervisor", daemon=True)

    def start(self) -> "Capture":
        self._supervisor.start()
        return self

    def stop(self) -> None:
        """Stop and release the source. The reader owns its source and releases it when
        its read returns: releasing a capture from another thread mid-read can crash
        OpenCV. A reader stuck in a hung driver is left behind (daemon thread)."""
        self._stop.set()
        self._generation += 1
        with self.cond:
            self.cond.notify_all()
        self._supervisor.join(timeout=5)
        if self._reader is not None:
            self._reader.join(timeout=3)

    def take(self, timeout: float) -> Frame | None:
        """The newest frame not yet taken by any consumer, waiting up to `timeout` seconds.
        Several inference workers call this: each frame goes to one of them."""
        deadline = time.monotonic() + timeout
        with self.cond:
            while (self.newest is None or self.newest.seq <= self.taken) and self.state != "ended":
                left = deadline - time.monotonic()
                if left <= 0 or self._stop.is_set():
                    return None
                self.cond.wait(left)
            if self.newest is not None and self.newest.seq > self.taken:
                self.taken = self.newest.seq
                self.cond.notify_all()
                return self.newest
            return None

    def _set_state(self, state: str) -> None:
        if state != self.state:
            log.info("capture %s: %s", self.description or "source", state)
            self.state = state
            with self.cond:
                self.cond.notify_all()

    def _supervise(self) -> None:
        delay = self.backoff_s[0]
        first = True
        while not self._stop.is_set():
            if not first:
                self._set_state("reconnecting")
                self.reconnects += 1
                if self._stop.wait(delay):
                    return
                delay = min(delay * 2, self.backoff_s[1])
            first = False
            try:
                src = self.opener()
            except Exception as e:
                log.warning("capture: cannot open source: %s", e)
                continue
            self.description = getattr(src, "description", "source")
            self._generation += 1
            gen = self._generation
            self._last_frame_t = time.monotonic()
            ended = threading.Event()
            reader = threading.Thread(target=self._read, args=(src, gen, ended), name="capture-reader",
                                      daemon=True)
            self._reader = reader
            reader.start()
            while not self._stop.is_set():
                if ended.wait(0.1):
                    break
                if time.monotonic() - self._last_frame_t > self.stall_s:
                    log.warning("capture: no frame for %.1f s: stalled, reopening", self.stall_s)
                    self._set_state("stalled")
                    break
                if self.state == "running":
                    delay = self.backoff_s[0]  # healthy again: reset the backoff
            self._generation += 1  # abandons the reader; it releases its source when its read returns
            if self.state == "ended":
                return

    def _read(self, src: FrameSource, gen: int, ended: threading.Event) -> None:
        try:
            self._read_loop(src, gen, ended)
        finally:
            try:
                src.release()
            except Exception as e:  # a driver that died with the device
                log.warning("capture: release failed: %s", e)

    def _read_loop(self, src: FrameSource, gen: int, ended: threading.Event) -> None:
        next_t = time.monotonic()
        lossless = self.pace_fps <= 0 and not getattr(src, "is_live", True)
        while gen == self._generation and not self._stop.is_set():
            if lossless:
                with self.cond:
                    while self.taken < self.seq and gen == self._generation and not self._stop.is_set():
                        self.cond.wait(0.1)
                        self._last_frame_t = time.monotonic()  # waiting on the consumer is no stall
            try:
                ok, img = src.read()
            except Exception as e:
                log.warning("capture: read failed: %s", e)
                ok, img = False, None
            if gen != self._generation:
                return
            if not ok or img is None:
                if not getattr(src, "is_live", True) and not getattr(src, "loop", False):
                    self._set_state("ended")
                else:
                    log.warning("capture: source returned no frame (unplugged?)")
                ended.set()
                return
            img = as_bgr(img)
            if img is None:
                self.dropped_bad += 1
                if self.dropped_bad in (1, 10, 100) or self.dropped_bad % 1000 == 0:
                    log.warning("capture: dropped %d frame(s) that were not 8-bit grey, BGR or BGRA",
                                self.dropped_bad)
                continue
            if self.pace_fps > 0:  # a file played like a camera
                next_t += 1.0 / self.pace_fps
                wait = next_t - time.monotonic()
                if wait > 0:
                    time.sleep(wait)
                else:
                    next_t = time.monotonic()
            now = time.monotonic()
            self._last_frame_t = now
            with self.cond:
                self.seq += 1
                self.newest = Frame(self.seq, img, now)
                if self.state != "running":
                    self.state = "running"
                self.cond.notify_all()
