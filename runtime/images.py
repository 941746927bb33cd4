"""Image and frame geometry shared by the live runtime, the bench and compression, so that
all of them crop and size frames identically (views and OpenCV calls only, no per-pixel
Python work)."""
from __future__ import annotations

import math
from pathlib import Path

import cv2
import numpy as np

from .errors import InputError
from .outputs import atomic_write_bytes

IMAGE_EXTS = {".jpg", ".jpeg", ".png", ".bmp", ".tif", ".tiff", ".webp"}


def parse_resolution(text: str) -> tuple[int, int]:
    """'640x360' -> (640, 360)."""
    try:
        w, h = (int(v) for v in text.lower().split("x"))
        if w < 16 or h < 16:
            raise InputError
        return w, h
    except ValueError:
        raise InputError(f"resolution {text!r}: expected WIDTHxHEIGHT, e.g. 640x360") from None


def list_images(specs: list[str]) -> list[Path]:
    out: list[Path] = []
    for s in specs:
        p = Path(s)
        if p.is_dir():
            out += sorted(f for f in p.rglob("*") if f.suffix.lower() in IMAGE_EXTS)
        elif p.is_file():
            out.append(p)
        else:
            raise FileNotFoundError(f"{s}: no such image or folder")
    if not out:
        raise InputError(f"no images found in {', '.join(specs)}")
    return out


def read_image(path: Path) -> np.ndarray:
    img = cv2.imread(str(path), cv2.IMREAD_COLOR)
    if img is None:
        raise InputError(f"{path}: cannot be read as an image")
    return img


def as_bgr(frame: np.ndarray) -> np.ndarray | None:
    """A source frame as 8-bit 3-channel BGR, the models' input: grey (2-D or one channel)
    and BGRA are converted, 16-bit is scaled down; anything else (empty, other channel
    counts, float) is None, so that the caller drops the frame rather than the show."""
    if not isinstance(frame, np.ndarray) or frame.size == 0 or frame.ndim not in (2, 3):
        return None
    if frame.dtype == np.uint16:
        frame = (frame >> 8).astype(np.uint8)
    if frame.dtype != np.uint8:
        return None
    if frame.ndim == 2 or frame.shape[2] == 1:
        return cv2.cvtColor(frame.reshape(frame.shape[:2]), cv2.COLOR_GRAY2BGR)
    if frame.shape[2] == 4:
        return cv2.cvtColor(frame, cv2.COLOR_BGRA2BGR)
    return frame if frame.shape[2] == 3 else None


def write_image(path: Path, img: np.ndarray, params: list[int] | None = None) -> Path:
    """Encode by the file's extension and write atomically (runtime/outputs.py): a full disk
    raises an OSError naming `path` and leaves no partial file (cv2.imwrite would return
    False, or print libpng's "Write Error", and carry on)."""
    path = Path(path)
    ok, data = cv2.imencode(path.suffix or ".png", img, params or [])
    if not ok:
        raise InputError(f"{path}: OpenCV cannot encode an image of shape {img.shape} as {path.suffix}")
    atomic_write_bytes(path, lambda f: f.write(data.tobytes()))
    return path


def lcm_all(values: list[int]) -> int:
    out = 1
    for v in values:
        out = out * v // math.gcd(out, v)
    return out


def fit_multiple(w: int, h: int, multiple: int) -> tuple[int, int]:
    """Shrink a resolution to a multiple every model accepts."""
    return w - w % multiple, h - h % multiple


def crop_to_multiple(frame: np.ndarray, multiple: int) -> np.ndarray:
    """Centre-crop (H, W, 3) so H and W are multiples of `multiple` (a view, no copy)."""
    h, w = frame.shape[:2]
    nh, nw = h - h % multiple, w - w % multiple
    if nh == 0 or nw == 0:
        raise InputError(f"frame {w}x{h} is smaller than the model's size multiple {multiple}")
    y, x = (h - nh) // 2, (w - nw) // 2
    return frame[y:y + nh, x:x + nw]


def cover_crop(img: np.ndarray, w: int, h: int) -> np.ndarray:
    """Resize so the image covers w x h, then centre-crop to exactly w x h."""
    ih, iw = img.shape[:2]
    k = max(w / iw, h / ih)
    nw, nh = max(w, round(iw * k)), max(h, round(ih * k))
    if (nw, nh) != (iw, ih):
        img = cv2.resize(img, (nw, nh), interpolation=cv2.INTER_AREA if k < 1 else cv2.INTER_LINEAR)
    y, x = (nh - h) // 2, (nw - w) // 2
    return np.ascontiguousarray(img[y:y + h, x:x + w])


def letterbox(img: np.ndarray, w: int, h: int) -> np.ndarray:
    """Fit inside w x h keeping the aspect, black bars around."""
    ih, iw = img.shape[:2]
    k = min(w / iw, h / ih)
    nw, nh = max(1, round(iw * k)), max(1, round(ih * k))
    r = cv2.resize(img, (nw, nh), interpolation=cv2.INTER_LINEAR if k > 1 else cv2.INTER_AREA)
    out = np.zeros((h, w, 3), np.uint8)
    y, x = (h - nh) // 2, (w - nw) // 2
    out[y:y + nh, x:x + nw] = r
    return out
