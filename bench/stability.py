"""Temporal stability: warping error between consecutive outputs (after Lai et al. 2018,
"Learning Blind Video Temporal Consistency", and Ruder et al. 2016).

The flow is estimated on the INPUT frames with OpenCV's Farneback method (flow from
frame t+1 back to frame t), output t is warped onto t+1, and the squared difference
is averaged over pixels whose flow is consistent forwards and backwards and stays
inside the frame (occlusion mask as in Ruder et al. 2016, simplified). Pixel values
are scaled to [0, 1]; the score is the mean over consecutive pairs.
"""
from __future__ import annotations

import cv2
import numpy as np


def _flow(src_grey: np.ndarray, dst_grey: np.ndarray) -> np.ndarray:
    """Dense flow f with src(x) ~ dst(x + f(x))."""
    return cv2.calcOpticalFlowFarneback(src_grey, dst_grey, None, pyr_scale=0.5, levels=4,
                                        winsize=21, iterations=5, poly_n=7, poly_sigma=1.5, flags=0)


def _warp(img: np.ndarray, flow: np.ndarray) -> np.ndarray:
    h, w = flow.shape[:2]
    gx, gy = np.meshgrid(np.arange(w, dtype=np.float32), np.arange(h, dtype=np.float32))
    return cv2.remap(img, gx + flow[..., 0], gy + flow[..., 1], cv2.INTER_LINEAR,
                     borderMode=cv2.BORDER_REPLICATE)


def _valid_mask(back: np.ndarray, fwd: np.ndarray) -> np.ndarray:
    """Pixels of frame t+1 whose flow to t lands inside and returns to where it started."""
    h, w = back.shape[:2]
    gx, gy = np.meshgrid(np.arange(w, dtype=np.float32), np.arange(h, dtype=np.float32))
    tx, ty = gx + back[..., 0], gy + back[..., 1]
    inside = (tx >= 0) & (tx <= w - 1) & (ty >= 0) & (ty <= h - 1)
    fwd_at = _warp(fwd, back)
    err = np.sum((back + fwd_at) ** 2, axis=-1)
    mag = np.sum(back ** 2, axis=-1) + np.sum(fwd_at ** 2, axis=-1)
    consistent = err <= 0.01 * mag + 0.5  # Sundaram et al. 2010 style threshold
    return inside & consistent


def warp_error(inputs: list[np.ndarray], outputs: list[np.ndarray]) -> float:
    """Mean warping error over consecutive frame pairs; frames are uint8 BGR."""
    if len(inputs) != len(outputs) or len(inputs) < 2:
        raise ValueError("warping error needs at least two input frames and one output per input")
    errs = []
    for t in range(len(inputs) - 1):
        g0 = cv2.cvtColor(inputs[t], cv2.COLOR_BGR2GRAY)
        g1 = cv2.cvtColor(inputs[t + 1], cv2.COLOR_BGR2GRAY)
        back = _flow(g1, g0)  # frame t+1 -> t
        fwd = _flow(g0, g1)
        mask = _valid_mask(back, fwd)
        warped = _warp(outputs[t].astype(np.float32) / 255.0, back)
        diff = np.sum((outputs[t + 1].astype(np.float32) / 255.0 - warped) ** 2, axis=-1)
        errs.append(float(diff[mask].mean()) if mask.any() else 0.0)
    return float(np.mean(errs))
