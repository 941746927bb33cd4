"""`limner live`: camera (or clip) -> model(s) -> window / file, with a summary line.

Settings come from a show file (`--show`), with command-line flags on top; without a
show file, the one model given (default: the bundled one) plays.
"""
from __future__ import annotations

import dataclasses
import logging
from pathlib import Path

from .bundled import DEFAULT_MODEL
from .live_loop import Live, LiveStats
from .live_options import LiveOptions
from .model import load_model
from .settings import PlayItem, ShowConfig, load_show
from .sinks import Window, display_available
from .sources import DEMO, apply_camera_locks, open_source
from .unattended import setup_logging

log = logging.getLogger("limner.live")


def resolve(opts: LiveOptions) -> ShowConfig:
    show = load_show(Path(opts.show)) if opts.show else ShowConfig()
    if opts.model or not show.play:
        show.play = [PlayItem(model=str(opts.model or DEFAULT_MODEL), seconds=1e9)]
    def given(**kw) -> dict:  # the flags the operator set
        return {k: v for k, v in kw.items() if v is not None}

    # dataclasses.replace builds each section anew, so a flag is validated like the show file
    show.capture = dataclasses.replace(show.capture, **given(
        source=opts.source, loop=opts.loop, pace_fps=opts.pace_fps))
    show.inference = dataclasses.replace(show.inference, **given(
        threads=opts.threads, workers=opts.workers, resolution=opts.resolution or None,
        governor=False if opts.no_governor else None))
    show.display = dataclasses.replace(show.display, **given(
        fullscreen=opts.fullscreen, window=False if opts.headless else None))
    show.output = dataclasses.replace(show.output, **given(
        record=opts.output, snapshot_dir=opts.snapshot_dir, log_dir=opts.log_dir, heartbeat=opts.heartbeat))
    return show


def run_live(opts: LiveOptions) -> LiveStats:
    show = resolve(opts)
    for item in show.play:  # every model is checked before anything starts or is printed
        load_model(item.model, threads=1)
    setup_logging(show.output.log_dir, show.output.log_max_bytes, show.output.log_backups)
    c = show.capture
    spec = c.source or None

    # open once up front so a bad source fails with a clear message before anything starts
    first = open_source(spec, width=c.width, height=c.height, fps=c.fps, mjpg=c.mjpg, loop=c.loop)
    is_demo = first.description.startswith("demo")
    pending = [first]

    def opener():
        src = pending.pop() if pending else open_source(
            spec if not is_demo else DEMO, width=c.width, height=c.height, fps=c.fps, mjpg=c.mjpg, loop=c.loop)
        apply_camera_locks(src, c)
        return src

    show_window = show.display.window and display_available()
    record = show.output.record or None
    if record is None and not show_window and is_demo and not opts.headless:
        # no screen found: a file is the only way to see the result (an explicit
        # --headless means the operator wants no output, e.g. a measurement run)
        record = opts.demo_output
    d = show.display
    window = Window(d.fullscreen, d.monitor_x, d.monitor_y, d.monitor_width, d.monitor_height) \
        if show_window else None
    names = ", ".join(Path(p.model).name for p in show.play)
    print(f"playing {names}; source {first.description}; {'window' if window else 'no window'}"
          + (f"; recording to {record}" if record else ""), flush=True)
    live = Live(show, opener, max_frames=opts.frames, window=window, record=record,
                record_fps=c.pace_fps or c.fps)
    return live.run()

