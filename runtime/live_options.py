"""The options of `limner live`, declared once: each field is a command-line flag (its help
and metavar in the field's metadata); None means "as the show file (or default) says".
Light on purpose (dataclasses only): the CLI builds its parser from it without importing
the live pipeline."""
from __future__ import annotations

import argparse
import typing
from dataclasses import dataclass, field, fields

from .errors import InputError


def _opt(default, help: str, metavar: str | None = None, flag: bool = True):
    return field(default=default, metadata={"help": help, "metavar": metavar, "flag": flag})


@dataclass
class LiveOptions:
    show: str | None = _opt(None, "a show file (configs/shows/*.toml): playlist, hours, capture, "
                            "display, safety, output", "FILE")
    model: str | None = _opt(None, "one Limner .onnx model (default: the bundled one)", "FILE")
    source: str | None = _opt(None, "camera index, /dev/videoN, video file, stream URL, or 'demo' "
                              "(default: camera 0 if one opens, else the demo clip)", "SRC")
    output: str | None = _opt(None, "record the stylised video (.mp4, .avi, .mkv, .mov)", "FILE")
    frames: int = _opt(0, "stop after N frames (0: run until stopped)", "N")
    headless: bool = _opt(False, "no window")
    fullscreen: bool | None = _opt(None, "fullscreen kiosk window")
    loop: bool | None = _opt(None, "loop a video file or the demo clip")
    pace_fps: float | None = _opt(None, "play a file at F fps, like a camera", "F")
    resolution: str | None = _opt(None, "pin the inference size (governor off)", "WxH")
    no_governor: bool = _opt(False, "keep the largest ladder size")
    threads: int | None = _opt(None, "inference threads in all (default: all cores)", "N")
    workers: int | None = _opt(None, "frames stylised side by side, sharing the threads "
                               "(default: 2 on 2+ cores)", "N")
    snapshot_dir: str | None = _opt(None, "where the s key / SIGUSR1 writes stills", "DIR")
    log_dir: str | None = _opt(None, "rotating log files", "DIR")
    heartbeat: str | None = _opt(None, "touched every second for a watchdog", "FILE")
    # written when the demo clip runs with no screen (not a flag)
    demo_output: str = _opt("limner-demo.mp4", "", flag=False)

    def __post_init__(self) -> None:
        if self.frames < 0:
            raise InputError(f"--frames {self.frames}: must be 0 or more")


def add_arguments(p: argparse.ArgumentParser) -> None:
    """One flag per LiveOptions field."""
    hints = typing.get_type_hints(LiveOptions)
    for f in fields(LiveOptions):
        if not f.metadata["flag"]:
            continue
        flag, tp = "--" + f.name.replace("_", "-"), hints[f.name]
        base = next((a for a in typing.get_args(tp) if a is not type(None)), tp)
        if base is bool:
            p.add_argument(flag, action="store_true", default=f.default, help=f.metadata["help"])
        else:
            p.add_argument(flag, type=base, default=f.default, metavar=f.metadata["metavar"],
                           help=f.metadata["help"])


def from_args(a: argparse.Namespace) -> LiveOptions:
    return LiveOptions(**{f.name: getattr(a, f.name) for f in fields(LiveOptions) if f.metadata["flag"]})
