"""Frame geometry helpers (no per-pixel Python work: views and OpenCV calls only)."""
from __future__ import annotations

import numpy as np


def crop_to_multiple(frame: np.ndarray, multiple: int) -> np.ndarray:
    """Centre-crop (H, W, 3) so H and W are multiples of `multiple` (a view, no copy)."""
    h, w = frame.shape[:2]
    nh, nw = h - h % multiple, w - w % multiple
    if nh == 0 or nw == 0:
        raise ValueError(f"frame {w}x{h} is smaller than the model's size multiple {multiple}")
    y, x = (h - nh) // 2, (w - nw) // 2
    return frame[y:y + nh, x:x + nw]

