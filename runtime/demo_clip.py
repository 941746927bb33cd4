"""The bundled demo clip: slow pans and zooms across the bundled photos (openly
licensed, see assets/photos/SOURCES.md), generated on the fly, 640x360 at 30 fps."""
from __future__ import annotations

from pathlib import Path

import cv2
import numpy as np

PHOTOS = Path(__file__).parent / "assets" / "photos"
CLIP_PHOTOS = ("chelsea", "coffee", "grace_hopper", "rocket", "astronaut")


class DemoClip:
    """Frame source with the same read()/release() shape as cv2.VideoCapture."""

    is_live = False

    def __init__(self, width: int = 640, height: int = 360, fps: float = 30.0,
                 seconds_per_photo: float = 4.0, loop: bool = True) -> None:
        self.width, self.height, self.fps, self.loop = width, height, fps, loop
        self.photos = []
        for name in CLIP_PHOTOS:
            img = cv2.imread(str(PHOTOS / f"{name}.jpg"), cv2.IMREAD_COLOR)
            if img is None:
                raise FileNotFoundError(f"{PHOTOS / name}.jpg: bundled demo photo is missing")
            self.photos.append(img)
        self.per_photo = int(seconds_per_photo * fps)
        self.index = 0
        self.description = f"demo clip ({width}x{height}, {len(self.photos)} photos)"

    @property
    def length(self) -> int:
        return self.per_photo * len(self.photos)

    def frame_at(self, i: int) -> np.ndarray:
        p, t = divmod(i % self.length, self.per_photo)
        img = self.photos[p]
        u = t / max(self.per_photo - 1, 1)
        h, w = img.shape[:2]
        # the view keeps the output aspect; zoom from 1.0 to 1.35 while panning diagonally
        base = min(w / self.width, h / self.height)
        zoom = 1.0 + 0.35 * (0.5 - 0.5 * np.cos(np.pi * u))
        vw, vh = self.width * base / zoom, self.height * base / zoom
        direction = 1 if p % 2 == 0 else -1
        cx = w / 2 + direction * (u - 0.5) * (w - vw) * 0.9
        cy = h / 2 + (u - 0.5) * (h - vh) * 0.6
        m = np.array([[self.width / vw, 0, -(cx - vw / 2) * self.width / vw],
                      [0, self.height / vh, -(cy - vh / 2) * self.height / vh]], np.float32)
        return cv2.warpAffine(img, m, (self.width, self.height), flags=cv2.INTER_LINEAR,
                              borderMode=cv2.BORDER_REFLECT)

    def read(self) -> tuple[bool, np.ndarray | None]:
        if not self.loop and self.index >= self.length:
            return False, None
        f = self.frame_at(self.index)
        self.index += 1
        return True, f

    def release(self) -> None:
        pass
