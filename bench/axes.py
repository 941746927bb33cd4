"""The registry of quality metrics, read by quality, report, plots, pick and the config,
and the accessors of a report row. Adding a fidelity metric is one Metric here: its key,
labels, direction, perfect value and the function that computes it."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from .color import scielab_delta_e
from .metrics import ms_ssim, psnr, ssim

PSNR_CAP = 99.0  # identical images: 99 dB instead of infinity (JSON has no inf)


@dataclass(frozen=True)
class Metric:
    key: str          # name in report.json and report.csv
    label: str        # name shown to people
    unit: str
    higher: bool      # True: higher is better
    perfect: float    # the teacher against itself
    # (candidate BGR, teacher BGR, display pixels per degree) -> value
    compute: Callable[[np.ndarray, np.ndarray, float], float]

    def axis_label(self) -> str:
        unit = f", {self.unit}" if self.unit else ""
        return f"{self.label} to the teacher{unit} ({'higher' if self.higher else 'lower'} is better)"

    def worst(self, values: list[float]) -> float:
        return min(values) if self.higher else max(values)


QUALITY: dict[str, Metric] = {m.key: m for m in (
    Metric("ms_ssim", "MS-SSIM", "", True, 1.0, lambda a, b, ppd: ms_ssim(a, b)),
    Metric("ssim", "SSIM", "", True, 1.0, lambda a, b, ppd: ssim(a, b)),
    Metric("psnr", "PSNR", "dB", True, PSNR_CAP, lambda a, b, ppd: min(psnr(a, b), PSNR_CAP)),
    Metric("delta_e", "S-CIELAB dE00", "", False, 0.0, scielab_delta_e),
)}


def speed_at(row: dict, resolution: str, threads: int | None = None) -> dict | None:
    cands = [s for s in row["speed"] if s["resolution"] == resolution
             and (threads is None or s["threads"] == threads)]
    return max(cands, key=lambda s: s["threads"]) if cands else None


def quality_value(row: dict, axis: str) -> float:
    if row["fidelity"] is None:  # the teacher against itself
        return QUALITY[axis].perfect
    return row["fidelity"][axis]["mean"]
