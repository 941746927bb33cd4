"""The registry of quality metrics, read by quality, report, plots, pick and the config,
and the accessors of a report row. Adding a fidelity metric: its function in
quality.pair_metrics and one Metric here."""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Metric:
    key: str          # name in report.json and report.csv
    label: str        # name shown to people
    unit: str
    higher: bool      # True: higher is better
    perfect: float    # the teacher against itself

    def axis_label(self) -> str:
        unit = f", {self.unit}" if self.unit else ""
        return f"{self.label} to the teacher{unit} ({'higher' if self.higher else 'lower'} is better)"

    def worst(self, values: list[float]) -> float:
        return min(values) if self.higher else max(values)


QUALITY: dict[str, Metric] = {m.key: m for m in (
    Metric("ms_ssim", "MS-SSIM", "", True, 1.0),
    Metric("ssim", "SSIM", "", True, 1.0),
    Metric("psnr", "PSNR", "dB", True, 99.0),   # identical images: 99 dB (JSON has no infinity)
    Metric("delta_e", "S-CIELAB dE00", "", False, 0.0),
)}


def speed_at(row: dict, resolution: str, threads: int | None = None) -> dict | None:
    cands = [s for s in row["speed"] if s["resolution"] == resolution
             and (threads is None or s["threads"] == threads)]
    return max(cands, key=lambda s: s["threads"]) if cands else None


def quality_value(row: dict, axis: str) -> float:
    if row["fidelity"] is None:  # the teacher against itself
        return QUALITY[axis].perfect
    return row["fidelity"][axis]["mean"]
