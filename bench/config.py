"""Bench settings (configs/bench/*.toml)."""
from __future__ import annotations

from dataclasses import dataclass, field

from limner.runtime.errors import InputError
from limner.runtime.images import parse_resolution

from .axes import QUALITY

QUALITY_AXES = tuple(QUALITY)


@dataclass
class BenchConfig:
    resolutions: list[str] = field(default_factory=lambda: ["320x192", "640x360", "1280x720"])
    threads: list[int] = field(default_factory=lambda: [0])  # 0: all cores
    warmup: int = 5                   # untimed frames after the session is created
    frames: int = 40                  # timed frames per model x resolution x threads
    quality_resolution: str = "640x360"
    noise_sigma: float = 2.0          # camera-like Gaussian noise for floor and stability
    noise_seed: int = 0
    clip_frames: int = 24             # consecutive frames for the warping error
    display_width_m: float = 1.2      # viewing geometry for S-CIELAB (55-inch screen ...)
    viewing_distance_m: float = 2.0   # ... seen from 2 m)
    quality_axis: str = "ms_ssim"     # x axis of the Pareto plot
    plot_resolution: str = "640x360"
    min_fps: float = 30.0             # default thresholds: drawn on the plot
    min_ms_ssim: float = 0.80
    sample_image: int = 0             # which held-out image the sample grid shows

    def __post_init__(self) -> None:
        for r in self.resolutions + [self.quality_resolution, self.plot_resolution]:
            parse_resolution(r)
        if self.plot_resolution not in self.resolutions:
            raise InputError(f"plot_resolution={self.plot_resolution!r} is not among "
                             f"resolutions {self.resolutions}")
        if any(t < 0 for t in self.threads) or not self.threads:
            raise InputError(f"threads={self.threads}: need counts >= 0 (0: all cores)")
        if self.frames < 3 or self.warmup < 0:
            raise InputError(f"frames={self.frames} / warmup={self.warmup}: need frames >= 3, warmup >= 0")
        if self.quality_axis not in QUALITY_AXES:
            raise InputError(f"quality_axis={self.quality_axis!r}: one of {', '.join(QUALITY_AXES)}")
        if self.noise_sigma < 0 or self.clip_frames < 2:
            raise InputError("noise_sigma must be >= 0 and clip_frames >= 2")
