"""Turning an output frame into what the screen shows: rotation, mirror, scaling,
overlay, holding card."""
from __future__ import annotations

import cv2
import numpy as np

from .images import letterbox
from .settings import DisplaySettings

_ROT = {90: cv2.ROTATE_90_CLOCKWISE, 180: cv2.ROTATE_180, 270: cv2.ROTATE_90_COUNTERCLOCKWISE}


def present(img: np.ndarray, d: DisplaySettings, overlay_text: str | None = None) -> np.ndarray:
    if d.mirror:
        img = cv2.flip(img, 1)
    if d.rotate:
        img = cv2.rotate(img, _ROT[d.rotate])
    if d.size:
        w, h = (int(v) for v in d.size.lower().split("x"))
        img = letterbox(img, w, h)
    if overlay_text:
        img = img.copy()
        cv2.putText(img, overlay_text, (8, 20), cv2.FONT_HERSHEY_SIMPLEX, 0.5, (0, 0, 0), 3, cv2.LINE_AA)
        cv2.putText(img, overlay_text, (8, 20), cv2.FONT_HERSHEY_SIMPLEX, 0.5, (255, 255, 255), 1, cv2.LINE_AA)
    return img


def holding_card(w: int, h: int, text: str, blank: bool = False) -> np.ndarray:
    img = np.full((h, w, 3), 16, np.uint8)
    if not blank and text:
        scale = max(0.5, w / 900)
        (tw, th), _ = cv2.getTextSize(text, cv2.FONT_HERSHEY_SIMPLEX, scale, 2)
        cv2.putText(img, text, ((w - tw) // 2, (h + th) // 2), cv2.FONT_HERSHEY_SIMPLEX, scale,
                    (200, 200, 200), 2, cv2.LINE_AA)
    return img
