"""`limner live`: camera (or clip) -> model -> window / file, with an fps line at the end."""
from __future__ import annotations

import signal
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .bundled import DEFAULT_MODEL
from .frames import crop_to_multiple
from .model import load_model
from .sinks import VideoFile, Window, display_available
from .sources import open_source


@dataclass
class LiveConfig:
    model: str = str(DEFAULT_MODEL)
    source: str | None = None       # None: default camera, else the demo clip
    output: str | None = None       # video file to record to
    frames: int = 0                 # stop after this many frames (0: run until quit / end)
    headless: bool = False
    fullscreen: bool = False
    threads: int = 0                # onnxruntime intra-op threads (0: all cores)
    loop: bool = False              # loop a video file / the demo clip
    demo_output: str = "limner-demo.mp4"  # written when the demo clip runs with no screen


@dataclass
class LiveStats:
    frames: int
    seconds: float
    infer_seconds: float
    output: str | None

    @property
    def fps(self) -> float:
        return self.frames / self.seconds if self.seconds > 0 else 0.0

    def line(self) -> str:
        infer = self.frames / self.infer_seconds if self.infer_seconds > 0 else 0.0
        s = (f"processed {self.frames} frames in {self.seconds:.1f} s: {self.fps:.1f} fps end to end "
             f"({infer:.1f} fps inference alone)")
        return s + (f"; wrote {self.output}" if self.output else "")


class _Quit(Exception):
    pass


def run_live(cfg: LiveConfig) -> LiveStats:
    model = load_model(cfg.model, cfg.threads)
    source = open_source(cfg.source, loop=cfg.loop)
    show = not cfg.headless and display_available()
    out_path = cfg.output
    if out_path is None and not show and not source.is_live and source.description.startswith("demo"):
        out_path = cfg.demo_output  # nothing else would show the result
    print(f"model {model.path.name} ({model.meta.role}, {model.meta.precision}, style "
          f"{model.meta.style or '?'}); source {source.description}; "
          f"{'window' if show else 'no window'}" + (f"; recording to {out_path}" if out_path else ""))
    window = Window(cfg.fullscreen) if show else None
    writer = VideoFile(Path(out_path), 30.0) if out_path else None

    def on_signal(signum, frame):
        raise _Quit()

    old = {s: signal.signal(s, on_signal) for s in (signal.SIGINT, signal.SIGTERM)}
    n, infer = 0, 0.0
    t0 = time.perf_counter()
    try:
        while not cfg.frames or n < cfg.frames:
            ok, frame = source.read()
            if not ok or frame is None:
                break
            x = np.ascontiguousarray(crop_to_multiple(frame, model.size_multiple))
            ti = time.perf_counter()
            y = model.run(x)
            infer += time.perf_counter() - ti
            n += 1
            if writer:
                writer.write(y)
            if window and window.show(y) in (ord("q"), 27):
                break
    except _Quit:
        pass
    finally:
        seconds = time.perf_counter() - t0
        for s, h in old.items():
            signal.signal(s, h)
        source.release()
        if writer:
            writer.close()
        if window:
            window.close()
    return LiveStats(n, seconds, infer, out_path)
