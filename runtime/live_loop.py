"""The live pipeline: capture thread -> inference workers -> presenter (main thread).

The capture keeps only the newest frame, so a slow stage drops frames instead of
building a queue (latency stays bounded). Several workers stylise consecutive frames
side by side (onnxruntime releases the GIL while it runs and one session serves
concurrent calls); the presenter takes their results in capture order (inflight.py),
then applies temporal smoothing, the flash limiter, the window, recording and snapshots.
"""
from __future__ import annotations

import logging
import signal
import threading
import time
from collections import deque
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import cv2
import numpy as np

from .capture_thread import Capture
from .flash import FlashLimiter
from .governor import Governor
from .images import cover_crop, crop_to_multiple, letterbox
from .inflight import InFlight, Output
from .playlist import Playlist, is_open
from .present import holding_card, present
from .session import default_threads
from .settings import ShowConfig
from .sinks import VideoFile, Window
from .sources import FrameSource
from .unattended import Heartbeat, Snapshots, rss_mb

log = logging.getLogger("limner.live")


LATENCY_BINS = 10_000


@dataclass
class LiveStats:
    frames: int = 0
    seconds: float = 0.0
    # latency histogram in 1 ms bins (the last bin collects everything slower): bounded
    # memory however long the show runs; `recent_ms` feeds the periodic stats line
    latency_hist: np.ndarray = field(default_factory=lambda: np.zeros(LATENCY_BINS, np.int64))
    recent_ms: deque = field(default_factory=lambda: deque(maxlen=300))
    first_frame_s: float = 0.0
    rss_start_mb: float = 0.0
    rss_end_mb: float = 0.0
    reconnects: int = 0
    resolution_changes: int = 0
    captured: int = 0     # source frames from the first shown to the last shown
    workers: int = 1
    output: str | None = None
    sizes: dict[str, int] = field(default_factory=dict)

    @property
    def fps(self) -> float:
        """Frames after the first, over the time since the first was shown."""
        return (self.frames - 1) / self.seconds if self.seconds > 0 and self.frames > 1 else 0.0

    def add_latency(self, ms: float) -> None:
        self.latency_hist[min(LATENCY_BINS - 1, max(0, int(ms)))] += 1
        self.recent_ms.append(ms)

    def p(self, q: float) -> float:
        """Latency percentile in ms from the histogram (to the 1 ms bin; upper edge)."""
        n = int(self.latency_hist.sum())
        if not n:
            return 0.0
        k = int(np.searchsorted(np.cumsum(self.latency_hist), q / 100.0 * n))
        return float(min(k, LATENCY_BINS - 1) + 1)

    def line(self) -> str:
        size = max(self.sizes, key=self.sizes.get) if self.sizes else "?"
        s = (f"processed {self.frames} frames in {self.seconds:.1f} s: {self.fps:.1f} fps end to end at "
             f"{size}; capture-to-output latency p50 {self.p(50):.0f} ms, p95 {self.p(95):.0f} ms; "
             f"first frame after {self.first_frame_s:.2f} s; RSS {self.rss_start_mb:.0f} -> "
             f"{self.rss_end_mb:.0f} MB")
        if self.captured:
            skipped = max(0, self.captured - self.frames)
            s += f"; {skipped} of {self.captured} source frames skipped"
        s += f"; {self.workers} inference worker(s)"
        if self.reconnects:
            s += f"; {self.reconnects} reconnect(s)"
        return s + (f"; wrote {self.output}" if self.output else "")


def prepare(frame: np.ndarray, size: tuple[int, int], multiple: int, fit: str) -> np.ndarray:
    """Camera frame -> model input of (about) `size`, a multiple of `multiple` on each side."""
    w, h = size
    x = letterbox(frame, w, h) if fit == "letterbox" else cover_crop(frame, w, h)
    return np.ascontiguousarray(crop_to_multiple(x, multiple))


class Live:
    def __init__(self, show: ShowConfig, opener: Callable[[], FrameSource], *, max_frames: int = 0,
                 window: Window | None = None, record: str | None = None, record_fps: float = 30.0) -> None:
        self.show, self.max_frames = show, max_frames
        self.t_start = time.monotonic()
        inf, saf = show.inference, show.safety
        threads = inf.threads or default_threads()
        self.workers = inf.workers or min(2, threads)
        # each worker's onnxruntime call gets its share of the threads (one session serves all)
        self.playlist = Playlist(show.play, max(1, threads // self.workers), show.crossfade_s,
                                 saf.max_crossfade_step)
        self.multiple = self.playlist.size_multiple()
        self.capture = Capture(opener, stall_s=show.capture.stall_s, pace_fps=show.capture.pace_fps)
        self.governor = Governor(inf.sizes(), inf.target_fps, enabled=inf.governor and not inf.resolution)
        from .viewing import ViewingGeometry
        w0 = self.governor.ladder[-1][0]
        ppd = ViewingGeometry(saf.display_width_m, saf.viewing_distance_m).pixels_per_degree(w0)
        self.limiter = FlashLimiter(ppd, enabled=saf.flash_limit)
        self.window = window
        self.writer = VideoFile(Path(record), record_fps) if record else None
        self.snapshots = Snapshots(show.output.snapshot_dir, show.output.snapshot_keep)
        self.heartbeat = Heartbeat(show.output.heartbeat)
        self.inflight = InFlight()
        self._claim_lock = threading.Lock()   # take a frame and claim it as one step
        self.stop = threading.Event()
        self.workers_done = threading.Event()
        self._running = self.workers
        self.snapshot_requested = threading.Event()
        self.stats = LiveStats(rss_start_mb=rss_mb(), workers=self.workers)
        self.overlay = show.display.overlay
        self._workers = [threading.Thread(target=self._infer_loop, args=(i,), name=f"inference-{i}", daemon=True)
                         for i in range(self.workers)]

    # -- inference workers ------------------------------------------------------------
    def _stylise(self, x: np.ndarray) -> np.ndarray:
        pl = self.playlist
        # the presenter thread moves the playlist on: read its state once
        cur, fade_from, fade = pl.current, pl.fade_from, pl.fade
        y = cur.model.run(x)
        if fade_from is not None and fade < 1.0:
            old = pl.loaded[fade_from]
            y_old = old.model.run(x)
            y_old = _blend_strength(y_old, x, old.item.strength)
            y = _blend_strength(y, x, cur.item.strength)
            return cv2.addWeighted(y, fade, y_old, 1.0 - fade, 0.0)
        return _blend_strength(y, x, cur.item.strength)

    def _infer_loop(self, worker: int) -> None:
        try:
            while not self.stop.is_set():
                if not is_open(self.show.hours):
                    if worker == 0:
                        w, h = self.governor.ladder[-1]
                        card = holding_card(w, h, self.show.card_text, self.show.closed == "blank")
                        self.inflight.post(Output(-1, card, time.monotonic(), time.monotonic(), (w, h)))
                    self.stop.wait(1.0)
                    continue
                with self._claim_lock:
                    f = self.capture.take(timeout=0.25)
                    if f is not None:
                        self.inflight.claim(f.seq)
                if f is None:
                    if self.capture.state == "ended":
                        break
                    continue
                try:
                    t0 = time.perf_counter()
                    x = prepare(f.image, self.governor.size, self.multiple, self.show.inference.fit)
                    y = self._stylise(x)
                except Exception:
                    self.inflight.give_up(f.seq)
                    raise
                self.inflight.finish(Output(f.seq, y, f.t, time.monotonic(), (y.shape[1], y.shape[0]),
                                            time.perf_counter() - t0))
        except Exception:
            log.exception("inference stopped")
            self.stop.set()
        finally:
            with self._claim_lock:
                self._running -= 1
                if self._running == 0:
                    self.workers_done.set()  # the presenter shows what is still in flight, then ends
            with self.inflight.cond:
                self.inflight.cond.notify_all()

    # -- main thread --------------------------------------------------------------------
    def _key(self, k: int) -> None:
        if k in (ord("q"), 27):
            self.stop.set()
        elif k in (ord("n"), 83):   # n or right arrow
            self.playlist.step(+1)
        elif k in (ord("p"), 81):   # p or left arrow
            self.playlist.step(-1)
        elif k == ord("s"):
            self.snapshot_requested.set()
        elif k == ord("o"):
            self.overlay = not self.overlay

    def _trigger_file(self) -> None:
        t = self.show.output.trigger_file
        if t and Path(t).exists():
            Path(t).unlink(missing_ok=True)
            self.snapshot_requested.set()

    def run(self) -> LiveStats:
        """Start capture and inference, show each output as it comes, and stop cleanly on
        q, a signal, the end of the source or --frames."""
        old = self._install_signals()
        self.capture.start()
        for t in self._workers:
            t.start()
        view = _View(last_stats=time.monotonic(), last_shown=time.monotonic())
        try:
            while not self.stop.is_set():
                out = self.inflight.next(timeout=0.05)
                if out is None and self.workers_done.is_set() and not self.inflight.pending():
                    break  # the source ended and every frame taken from it was shown
                self.heartbeat.beat()
                self._trigger_file()
                if out is not None:
                    self._show(out, view)
                    if self.max_frames and self.stats.frames >= self.max_frames:
                        break
                elif self.window:
                    self._key(self.window.poll())  # keep the last good output on screen
                self._log_stats(view)
        finally:
            self._shut_down(old, time.monotonic(), view.t_begin)
        return self.stats

    def _install_signals(self) -> dict:
        """SIGINT / SIGTERM stop the show, SIGUSR1 takes a snapshot; returns the old handlers."""
        if threading.current_thread() is not threading.main_thread():
            return {}
        old = {s: signal.signal(s, lambda signum, frame: self.stop.set()) for s in (signal.SIGINT, signal.SIGTERM)}
        if hasattr(signal, "SIGUSR1"):
            old[signal.SIGUSR1] = signal.signal(signal.SIGUSR1, lambda signum, frame: self.snapshot_requested.set())
        return old

    def _show(self, out: Output, view: _View) -> None:
        """One output: smoothing, the flash limiter, stats, recording, snapshot, window."""
        t_now = time.monotonic()
        if out.seq >= 0:
            view.seq0 = out.seq if view.seq0 is None else view.seq0
            self.stats.captured = out.seq - view.seq0 + 1  # source frames this run spanned
            self.governor.observe(out.busy_s / self.workers, t_now)
            self.playlist.tick(t_now, t_now - view.last_shown)
        view.last_shown = t_now
        image = out.image
        a = self.show.inference.smoothing
        if a > 0 and out.seq >= 0 and view.prev is not None and view.prev.shape == image.shape:
            image = cv2.addWeighted(image, 1.0 - a, view.prev, a, 0.0)
        view.prev = image
        # the flash limiter runs here, beside the next inferences, not after them
        image = self.limiter(image, time.monotonic())
        now = time.monotonic()
        if view.t_begin is None:
            view.t_begin = now
            self.stats.first_frame_s = now - self.t_start
        self.stats.frames += 1
        if out.seq >= 0:
            self.stats.add_latency((now - out.t_capture) * 1000)
        key = f"{out.size[0]}x{out.size[1]}"
        self.stats.sizes[key] = self.stats.sizes.get(key, 0) + 1
        view.recent = [t for t in view.recent if now - t < 1.0] + [now]
        if self.writer:
            self.writer.write(image)
        if self.snapshot_requested.is_set():
            self.snapshot_requested.clear()
            self.snapshots.take(image)
        if self.window:
            text = f"{len(view.recent)} fps  {out.size[0]}x{out.size[1]}" if self.overlay else None
            self._key(self.window.show(present(image, self.show.display, text)))

    def _log_stats(self, view: _View) -> None:
        if time.monotonic() - view.last_stats < self.show.output.stats_every_s:
            return
        view.last_stats = time.monotonic()
        lat = list(self.stats.recent_ms)
        log.info("stats: %.1f fps, latency p95 %.0f ms, size %s, capture %s, RSS %.0f MB",
                 len([t for t in view.recent if view.last_stats - t < 1.0]),
                 float(np.percentile(lat, 95)) if lat else 0.0,
                 "x".join(map(str, self.governor.size)), self.capture.state, rss_mb())

    def _shut_down(self, old_handlers: dict, end: float, t_begin: float | None) -> None:
        self.stop.set()
        # let the current inferences finish: tearing down onnxruntime under a running
        # session crashes the process
        for t in self._workers:
            t.join(timeout=120)
        self.capture.stop()
        if self.writer:
            self.writer.close()
            self.stats.output = str(self.writer.path)
        if self.window:
            self.window.close()
        for s, h in old_handlers.items():
            signal.signal(s, h)
        self.stats.seconds = (end - t_begin) if t_begin else 0.0
        self.stats.rss_end_mb = rss_mb()
        self.stats.reconnects = self.capture.reconnects
        self.stats.resolution_changes = self.governor.changes


@dataclass
class _View:
    """What the presenting thread remembers between outputs."""
    last_stats: float
    last_shown: float
    t_begin: float | None = None       # when the first output was shown
    seq0: int | None = None            # the first source frame shown
    prev: np.ndarray | None = None     # the last output (smoothing)
    recent: list[float] = field(default_factory=list)  # show times in the last second


def _blend_strength(y: np.ndarray, x: np.ndarray, strength: float) -> np.ndarray:
    if strength >= 1.0:
        return y
    return cv2.addWeighted(y, strength, x, 1.0 - strength, 0.0)
