"""Where stylised frames go: a window, a video file."""
from __future__ import annotations

import os
import sys
from pathlib import Path

import cv2
import numpy as np

from .errors import InputError

WINDOW = "limner"
# Qt's X11 shared-memory images intermittently left the window black on Xvfb (measured
# here: 2 of 6 starts without this, 8 of 8 with it); plain X11 puts cost little at
# camera resolutions. Set before the first window is created.
os.environ.setdefault("QT_X11_NO_MITSHM", "1")


def display_available() -> bool:
    """A screen to draw on: X11/Wayland on Linux, assumed elsewhere; and a GUI-capable OpenCV."""
    if sys.platform.startswith("linux") and not (os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY")):
        return False
    info = cv2.getBuildInformation()
    gui_line = next((l for l in info.splitlines() if l.strip().startswith("GUI:")), "")
    return "NONE" not in gui_line.upper()  # opencv-python-headless has no imshow


def x11_screen_size() -> tuple[int, int] | None:
    """The X screen's size through libX11 (None off X11 or without the library)."""
    if not sys.platform.startswith("linux") or not os.environ.get("DISPLAY"):
        return None
    try:
        import ctypes
        x11 = ctypes.CDLL("libX11.so.6")
        x11.XOpenDisplay.restype = ctypes.c_void_p
        x11.XOpenDisplay.argtypes = [ctypes.c_char_p]
        x11.XDefaultScreen.argtypes = [ctypes.c_void_p]
        x11.XDisplayWidth.argtypes = [ctypes.c_void_p, ctypes.c_int]
        x11.XDisplayHeight.argtypes = [ctypes.c_void_p, ctypes.c_int]
        x11.XCloseDisplay.argtypes = [ctypes.c_void_p]
        d = x11.XOpenDisplay(None)
        if not d:
            return None
        try:
            scr = x11.XDefaultScreen(d)
            return int(x11.XDisplayWidth(d, scr)), int(x11.XDisplayHeight(d, scr))
        finally:
            x11.XCloseDisplay(d)
    except (OSError, AttributeError):
        return None


class Window:
    def __init__(self, fullscreen: bool = False, x: int = 0, y: int = 0, width: int = 0,
                 height: int = 0) -> None:
        # WINDOW_NORMAL is needed for fullscreen; GUI_NORMAL drops the toolbar (kiosk)
        cv2.namedWindow(WINDOW, cv2.WINDOW_NORMAL | getattr(cv2, "WINDOW_GUI_NORMAL", 0))
        if x or y:
            cv2.moveWindow(WINDOW, x, y)  # onto the chosen monitor before going fullscreen
        if fullscreen:
            cv2.setWindowProperty(WINDOW, cv2.WND_PROP_FULLSCREEN, cv2.WINDOW_FULLSCREEN)
            # A kiosk often runs on a bare X server with no window manager to honour the
            # fullscreen request: size the window to the monitor ourselves.
            size = (width, height) if width and height else x11_screen_size()
            if size:
                cv2.resizeWindow(WINDOW, *size)
                cv2.moveWindow(WINDOW, x, y)

    def show(self, frame: np.ndarray) -> int:
        """Draw and return the key pressed (-1 for none); pollKey does not sleep."""
        cv2.imshow(WINDOW, frame)
        return cv2.pollKey()

    def poll(self) -> int:
        return cv2.pollKey()

    def close(self) -> None:
        cv2.destroyWindow(WINDOW)
        cv2.pollKey()


GROWTH_CHECK_EVERY = 120  # frames between checks that the recording grows (a few seconds)


class VideoFile:
    """mp4v for .mp4/.mov, MJPG for .avi (the pip wheels carry no H.264 encoder).

    Written to a temp name and renamed on close, so an interrupted run leaves no
    half-written file under the requested name."""

    def __init__(self, path: Path, fps: float) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        ext = self.path.suffix.lower()
        if ext not in (".mp4", ".mov", ".avi", ".mkv"):
            raise InputError(f"{self.path}: output must end in .mp4, .mov, .avi or .mkv")
        self.fourcc = cv2.VideoWriter_fourcc(*("MJPG" if ext in (".avi", ".mkv") else "mp4v"))
        self.tmp = self.path.with_name(f".{self.path.stem}.partial{ext}")
        self.fps = fps
        self.writer: cv2.VideoWriter | None = None
        self.size: tuple[int, int] | None = None
        self.frames = 0
        self._size_at_check = 0

    def write(self, frame: np.ndarray) -> None:
        h, w = frame.shape[:2]
        if self.writer is None:
            self.size = (w, h)
            self.writer = cv2.VideoWriter(str(self.tmp), self.fourcc, self.fps, self.size)
            if not self.writer.isOpened():
                raise InputError(f"{self.path}: cannot open a video writer")
        if (w, h) != self.size:
            frame = cv2.resize(frame, self.size, interpolation=cv2.INTER_LINEAR)
        self.writer.write(frame)  # OpenCV reports no write errors: the file's growth is checked
        self.frames += 1
        if self.frames % GROWTH_CHECK_EVERY == 0:
            size = self.tmp.stat().st_size if self.tmp.exists() else 0
            if size <= self._size_at_check:
                self._fail(f"stopped growing at {size:,} bytes after {self.frames} frames")
            self._size_at_check = size

    def _fail(self, why: str) -> None:
        if self.writer is not None:
            self.writer.release()
            self.writer = None
        self.tmp.unlink(missing_ok=True)
        raise InputError(f"{self.path}: the recording could not be written ({why}; disk full or "
                         "file size limit?); it was removed")

    def close(self) -> None:
        if self.writer is not None:
            self.writer.release()
            self.writer = None
            cap = cv2.VideoCapture(str(self.tmp))
            readable = int(cap.get(cv2.CAP_PROP_FRAME_COUNT)) if cap.isOpened() else 0
            cap.release()
            if readable < self.frames:
                self._fail(f"{readable} of {self.frames} frames readable")
            os.replace(self.tmp, self.path)
