"""The bundled demo clip, 640x360: the real street video (assets/clips/street.mp4, a cut
of OpenCV's vtest.avi, 150 frames), then slow pans and zooms across held-out photos
(assets/photos/heldout; sources and licences in assets/photos/SOURCES.md).

Both parts were held out from training, distillation and calibration. The video is
decoded as it plays (nothing held in memory but the photos); the bench takes its first
frames, the real video, for the warping error.
"""
from __future__ import annotations

from pathlib import Path

import cv2
import numpy as np

ASSETS = Path(__file__).parent / "assets"
CLIP = ASSETS / "clips" / "street.mp4"
PHOTOS = ASSETS / "photos" / "heldout"
CLIP_PHOTOS = ("chelsea", "coffee", "squirrel", "fruits")


class DemoClip:
    """Frame source with the same read()/release() shape as cv2.VideoCapture."""

    is_live = False

    def __init__(self, width: int = 640, height: int = 360, fps: float = 30.0,
                 seconds_per_photo: float = 4.0, loop: bool = True) -> None:
        self.width, self.height, self.fps, self.loop = width, height, fps, loop
        if not CLIP.is_file():
            raise FileNotFoundError(f"{CLIP}: the bundled demo video is missing")
        probe = cv2.VideoCapture(str(CLIP))
        self.video_frames = int(probe.get(cv2.CAP_PROP_FRAME_COUNT))
        probe.release()
        if self.video_frames < 2:
            raise FileNotFoundError(f"{CLIP}: the bundled demo video cannot be read")
        self.photos = []
        for name in CLIP_PHOTOS:
            img = cv2.imread(str(PHOTOS / f"{name}.jpg"), cv2.IMREAD_COLOR)
            if img is None:
                raise FileNotFoundError(f"{PHOTOS / name}.jpg: bundled demo photo is missing")
            self.photos.append(img)
        self.per_photo = int(seconds_per_photo * fps)
        self.index = 0
        self._cap: cv2.VideoCapture | None = None
        self.description = (f"demo clip ({width}x{height}: street video, {self.video_frames} frames, "
                            f"then {len(self.photos)} photos)")

    @property
    def length(self) -> int:
        return self.video_frames + self.per_photo * len(self.photos)

    def _video_frame(self) -> np.ndarray | None:
        if self._cap is None:
            self._cap = cv2.VideoCapture(str(CLIP))
        ok, f = self._cap.read()
        if not ok or f is None:
            return None
        if f.shape[:2] != (self.height, self.width):
            f = cv2.resize(f, (self.width, self.height), interpolation=cv2.INTER_AREA)
        return f

    def photo_frame(self, i: int) -> np.ndarray:
        """Frame i of the photo part: a pan and zoom across one photo."""
        p, t = divmod(i % (self.per_photo * len(self.photos)), self.per_photo)
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
        if self.index >= self.length:
            if not self.loop:
                return False, None
            self.index = 0
        pos = self.index
        self.index += 1
        if pos < self.video_frames:
            f = self._video_frame()
            if f is not None:
                return True, f
            self.index = pos = self.video_frames  # a short decode: go on with the photos
            self.index += 1
        if self._cap is not None:
            self._cap.release()
            self._cap = None
        return True, self.photo_frame(pos - self.video_frames)

    def release(self) -> None:
        if self._cap is not None:
            self._cap.release()
            self._cap = None
