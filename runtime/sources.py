"""Opening frame sources: camera index, device path, video file, stream URL, or the demo clip."""
from __future__ import annotations

import glob
import os
import platform
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Protocol

import numpy as np

# OpenCV's V4L backend stalls 10 s on a dead camera by default; read once at first open,
# so it must be set before cv2 opens anything (docs/architecture.md).
os.environ.setdefault("OPENCV_VIDEOIO_V4L_SELECT_TIMEOUT", "2000")

import cv2  # noqa: E402

from .errors import InputError

DEMO = "demo"


class SourceError(InputError):
    pass


class FrameSource(Protocol):
    is_live: bool
    description: str

    def read(self) -> tuple[bool, np.ndarray | None]: ...

    def release(self) -> None: ...


@dataclass
class CaptureSource:
    """A cv2.VideoCapture with a description; cameras and streams are live, files are not."""
    cap: cv2.VideoCapture
    description: str
    is_live: bool
    loop: bool = False

    def read(self) -> tuple[bool, np.ndarray | None]:
        ok, frame = self.cap.read()
        if not ok and self.loop and not self.is_live:
            self.cap.set(cv2.CAP_PROP_POS_FRAMES, 0)
            ok, frame = self.cap.read()
        return ok, frame

    def release(self) -> None:
        self.cap.release()

    @property
    def fps(self) -> float:
        return float(self.cap.get(cv2.CAP_PROP_FPS) or 0.0)


def camera_devices() -> list[str]:
    """Video device nodes on Linux (empty elsewhere: there, indices are probed instead)."""
    if sys.platform.startswith("linux"):
        return sorted(glob.glob("/dev/video*"), key=lambda p: int(p[10:]) if p[10:].isdigit() else 0)
    return []


def _open_camera(index_or_path: int | str, width: int, height: int, fps: float,
                 mjpg: bool) -> cv2.VideoCapture:
    backend = cv2.CAP_V4L2 if sys.platform.startswith("linux") else cv2.CAP_ANY
    cap = cv2.VideoCapture(index_or_path, backend)
    if cap.isOpened():
        if mjpg:  # uncompressed YUYV caps most USB cameras at 720p10; MJPG gets 720p30
            cap.set(cv2.CAP_PROP_FOURCC, cv2.VideoWriter_fourcc(*"MJPG"))
        if width and height:
            cap.set(cv2.CAP_PROP_FRAME_WIDTH, width)
            cap.set(cv2.CAP_PROP_FRAME_HEIGHT, height)
        if fps:
            cap.set(cv2.CAP_PROP_FPS, fps)
    return cap


def default_camera_available() -> bool:
    if sys.platform.startswith("linux"):
        return bool(camera_devices())
    return platform.system() in ("Darwin", "Windows")


def open_source(spec: str | None, *, width: int = 1280, height: int = 720, fps: float = 30.0,
                mjpg: bool = True, loop: bool = False) -> FrameSource:
    """None: the default camera if one opens, else the demo clip."""
    from .demo_clip import DemoClip

    if spec is None:
        if default_camera_available():
            cap = _open_camera(0, width, height, fps, mjpg)
            if cap.isOpened():
                ok, _ = cap.read()
                if ok:
                    return CaptureSource(cap, "camera 0", True)
            cap.release()
        return DemoClip(loop=loop)
    if spec == DEMO:
        return DemoClip(loop=loop)
    if spec.isdigit():
        cap = _open_camera(int(spec), width, height, fps, mjpg)
        if not cap.isOpened():
            raise SourceError(f"camera {spec}: cannot be opened (see `limner live --list-cameras`)")
        return CaptureSource(cap, f"camera {spec}", True)
    if spec.startswith("/dev/"):
        cap = _open_camera(spec, width, height, fps, mjpg)
        if not cap.isOpened():
            raise SourceError(f"{spec}: camera device cannot be opened")
        return CaptureSource(cap, spec, True)
    if "://" in spec:
        cap = cv2.VideoCapture(spec)
        if not cap.isOpened():
            raise SourceError(f"{spec}: stream cannot be opened")
        return CaptureSource(cap, spec, True)
    path = Path(spec)
    if not path.is_file():
        raise SourceError(f"{spec}: no such video file, camera index, device or URL")
    cap = cv2.VideoCapture(str(path))
    if not cap.isOpened():
        raise SourceError(f"{spec}: cannot be read as a video")
    return CaptureSource(cap, str(path), False, loop)


def apply_camera_locks(src: FrameSource, settings) -> None:
    """Exposure and white-balance locks for cameras (no-ops for files and the demo clip).

    Auto exposure makes a stylised image shimmer as the camera hunts; locking keeps the
    value the camera settled on, or the one given."""
    cap = getattr(src, "cap", None)
    if cap is None or not getattr(src, "is_live", False) or "://" in getattr(src, "description", ""):
        return
    if settings.lock_exposure:
        value = settings.exposure or cap.get(cv2.CAP_PROP_EXPOSURE)
        cap.set(cv2.CAP_PROP_AUTO_EXPOSURE, 1)  # V4L2: 1 = manual, 3 = aperture priority (auto)
        cap.set(cv2.CAP_PROP_EXPOSURE, value)
    if settings.lock_white_balance:
        value = settings.white_balance or cap.get(cv2.CAP_PROP_WB_TEMPERATURE)
        cap.set(cv2.CAP_PROP_AUTO_WB, 0)
        if value:
            cap.set(cv2.CAP_PROP_WB_TEMPERATURE, value)


def list_cameras(max_index: int = 8) -> list[str]:
    """Cameras that open, with their names where the system tells them."""
    found = []
    if sys.platform.startswith("linux"):
        for dev in camera_devices():
            name_file = Path("/sys/class/video4linux") / Path(dev).name / "name"
            name = name_file.read_text().strip() if name_file.exists() else "?"
            cap = cv2.VideoCapture(dev, cv2.CAP_V4L2)
            ok = cap.isOpened()
            cap.release()
            if ok:
                found.append(f"{dev} (index {dev[10:]}): {name}")
        return found
    for i in range(max_index):
        cap = cv2.VideoCapture(i)
        if cap.isOpened():
            found.append(f"index {i}")
        cap.release()
    return found
