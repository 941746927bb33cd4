"""Quality loss against the teacher, the teacher's own noise floor, and stability."""
from __future__ import annotations

import numpy as np

from .axes import QUALITY
from .metrics import ms_ssim, ssim
from .stability import warp_error


def pair_metrics(a: np.ndarray, b: np.ndarray, ppd: float) -> dict[str, float]:
    """Every registered quality metric (axes.QUALITY) of output `a` against the teacher's `b`."""
    return {k: float(m.compute(a, b, ppd)) for k, m in QUALITY.items()}


def summarise(per_image: list[dict[str, float]]) -> dict[str, dict[str, float]]:
    """Mean and worst image for each metric (worst: lowest, or highest for delta_e)."""
    out = {}
    for k, metric in QUALITY.items():
        vals = [d[k] for d in per_image if k in d]
        if vals:
            out[k] = {"mean": float(np.mean(vals)), "worst": float(metric.worst(vals))}
    return out


def compare_sets(outs: list[np.ndarray], refs: list[np.ndarray], ppd: float) -> dict:
    return summarise([pair_metrics(o, r, ppd) for o, r in zip(outs, refs)])


def stability(clean_outs: list[np.ndarray], noisy_outs: list[np.ndarray],
              clip_in: list[np.ndarray] | None, clip_outs: list[np.ndarray] | None) -> dict:
    """A model's own output under camera-like noise against its clean output, and the
    warping error on a clip."""
    self_noise = [{"ssim": ssim(a, b), "ms_ssim": ms_ssim(a, b)} for a, b in zip(noisy_outs, clean_outs)]
    out = {"noise_ssim": float(np.mean([d["ssim"] for d in self_noise])),
           "noise_ms_ssim": float(np.mean([d["ms_ssim"] for d in self_noise]))}
    if clip_in is not None and clip_outs is not None:
        out["warp_error"] = warp_error(clip_in, clip_outs)
        out["warp_error_input"] = warp_error(clip_in, clip_in)  # the clip's own residual
    return out
