"""The live stage's typed settings, loaded from a show file (configs/shows/*.toml)."""
from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

from . import config as cfgmod
from .errors import InputError

_HOURS = re.compile(r"^([01]\d|2[0-3]):([0-5]\d)-([01]\d|2[0-4]):([0-5]\d)$")


@dataclass
class CaptureSettings:
    source: str = ""                # "": default camera if one opens, else the demo clip
    width: int = 1280
    height: int = 720
    fps: float = 30.0
    mjpg: bool = True               # USB cameras need MJPG for 720p30
    loop: bool = False              # loop a video file or the demo clip
    pace_fps: float = 0.0           # play a file at this rate, like a camera (0: as fast as read)
    lock_exposure: bool = False     # auto exposure makes a stylised image shimmer
    exposure: float = 0.0           # with lock_exposure; 0: keep the value the camera settled on
    lock_white_balance: bool = False
    white_balance: int = 0          # kelvin with lock_white_balance; 0: keep the settled value
    stall_s: float = 3.0            # no frame for this long: reopen the source

    def __post_init__(self) -> None:
        if self.stall_s <= 0 or self.fps <= 0 or self.pace_fps < 0:
            raise InputError("capture: stall_s and fps must be positive, pace_fps >= 0")


@dataclass
class InferenceSettings:
    threads: int = 0                # onnxruntime threads in all (0: all cores)
    workers: int = 0                # frames stylised side by side, sharing the threads (0: auto,
                                    # min(2, threads): two one-thread calls beat one two-thread call)
    ladder: list[str] = field(default_factory=lambda: ["320x180", "480x270", "640x360"])
    resolution: str = ""            # pin one size (switches the governor off)
    target_fps: float = 30.0
    governor: bool = True
    fit: str = "crop"               # crop | letterbox to the model's size multiple
    smoothing: float = 0.0          # temporal smoothing: weight of the previous output (0 - 0.9)

    def __post_init__(self) -> None:
        from .images import parse_resolution
        for r in self.ladder + ([self.resolution] if self.resolution else []):
            parse_resolution(r)
        if self.fit not in ("crop", "letterbox"):
            raise InputError(f"inference.fit={self.fit!r}: crop or letterbox")
        if not 0 <= self.smoothing <= 0.9:
            raise InputError(f"inference.smoothing={self.smoothing}: between 0 and 0.9")
        if self.threads < 0:
            raise InputError(f"inference.threads={self.threads}: 0 (all cores) or more")
        if self.workers < 0:
            raise InputError(f"inference.workers={self.workers}: 0 (auto) or more")
        if self.target_fps <= 0:
            raise InputError(f"inference.target_fps={self.target_fps}: must be positive")

    def sizes(self) -> list[tuple[int, int]]:
        from .images import parse_resolution
        return [parse_resolution(self.resolution)] if self.resolution else \
            [parse_resolution(r) for r in self.ladder]


@dataclass
class DisplaySettings:
    window: bool = True             # false: headless
    fullscreen: bool = False        # kiosk: no toolbar
    monitor_x: int = 0              # top-left of the monitor to use (multi-monitor desktops)
    monitor_y: int = 0
    monitor_width: int = 0          # the monitor's size (0: the whole X screen)
    monitor_height: int = 0
    rotate: int = 0                 # 0, 90, 180, 270 (portrait screens, projectors)
    mirror: bool = False
    size: str = ""                  # scale the output to WxH (letterboxed), e.g. a projector's mode
    overlay: bool = False           # fps and resolution in a corner

    def __post_init__(self) -> None:
        if self.rotate not in (0, 90, 180, 270):
            raise InputError(f"display.rotate={self.rotate}: 0, 90, 180 or 270")
        if self.size:
            from .images import parse_resolution
            parse_resolution(self.size)


@dataclass
class SafetySettings:
    flash_limit: bool = True        # WCAG 2.3.1 general and red flash thresholds
    display_width_m: float = 1.2    # viewing geometry for the area rule
    viewing_distance_m: float = 2.0
    max_crossfade_step: float = 0.05  # at most this much of a style change per frame

    def __post_init__(self) -> None:
        if self.display_width_m <= 0 or self.viewing_distance_m <= 0:
            raise InputError("safety: display_width_m and viewing_distance_m must be positive")


@dataclass
class OutputSettings:
    record: str = ""                # video file; nothing is written unless set
    snapshot_dir: str = ""          # snapshots only when set
    snapshot_keep: int = 500        # retention: oldest snapshots beyond this are deleted
    trigger_file: str = ""          # a file whose appearance takes a snapshot (then it is removed)
    log_dir: str = ""               # rotating log files
    log_max_bytes: int = 1_000_000
    log_backups: int = 5
    heartbeat: str = ""             # touched every second, for an external watchdog
    stats_every_s: float = 10.0     # a stats line in the log this often


@dataclass
class PlayItem:
    model: str
    seconds: float = 300.0
    strength: float = 1.0           # 1: fully stylised; 0: the camera image

    def __post_init__(self) -> None:
        if self.seconds <= 0:
            raise InputError(f"play {self.model}: seconds={self.seconds} must be positive")
        if not 0 <= self.strength <= 1:
            raise InputError(f"play {self.model}: strength={self.strength} must be between 0 and 1")


@dataclass
class ShowConfig:
    name: str = "show"
    crossfade_s: float = 2.0
    hours: list[str] = field(default_factory=list)   # "HH:MM-HH:MM"; empty: always open
    closed: str = "card"            # outside hours: card | blank
    card_text: str = "Opening soon"
    play: list[PlayItem] = field(default_factory=list)
    capture: CaptureSettings = field(default_factory=CaptureSettings)
    inference: InferenceSettings = field(default_factory=InferenceSettings)
    display: DisplaySettings = field(default_factory=DisplaySettings)
    safety: SafetySettings = field(default_factory=SafetySettings)
    output: OutputSettings = field(default_factory=OutputSettings)

    def __post_init__(self) -> None:
        for h in self.hours:
            if not _HOURS.match(h):
                raise InputError(f"hours: {h!r} is not HH:MM-HH:MM")
        if self.closed not in ("card", "blank"):
            raise InputError(f"closed={self.closed!r}: card or blank")
        if self.crossfade_s < 0:
            raise InputError(f"crossfade_s={self.crossfade_s}: must be >= 0")


def load_show(path: Path) -> ShowConfig:
    """Load a show file; model paths are relative to the show file; missing models are errors."""
    path = Path(path)
    show = cfgmod.load(ShowConfig, path)
    for item in show.play:
        p = Path(item.model).expanduser()
        if not p.is_absolute():
            p = (path.parent / p).resolve()
        if not p.is_file():
            raise cfgmod.ConfigError(f"{path}: play model {item.model!r} not found ({p})")
        item.model = str(p)
    return show
