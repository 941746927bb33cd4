"""Turning held-out images into identical model inputs for every candidate."""
from __future__ import annotations

import math
from pathlib import Path

import cv2
import numpy as np

IMAGE_EXTS = {".jpg", ".jpeg", ".png", ".bmp", ".tif", ".tiff", ".webp"}


def list_images(specs: list[str]) -> list[Path]:
    out: list[Path] = []
    for s in specs:
        p = Path(s)
        if p.is_dir():
            out += sorted(f for f in p.rglob("*") if f.suffix.lower() in IMAGE_EXTS)
        elif p.is_file():
            out.append(p)
        else:
            raise FileNotFoundError(f"{s}: no such held-out image or folder")
    if not out:
        raise ValueError(f"no held-out images found in {', '.join(specs)}")
    return out


def read_image(path: Path) -> np.ndarray:
    img = cv2.imread(str(path), cv2.IMREAD_COLOR)
    if img is None:
        raise ValueError(f"{path}: cannot be read as an image")
    return img


def fit_multiple(w: int, h: int, multiple: int) -> tuple[int, int]:
    """Shrink a resolution to a multiple every model accepts."""
    return w - w % multiple, h - h % multiple


def lcm_all(values: list[int]) -> int:
    out = 1
    for v in values:
        out = out * v // math.gcd(out, v)
    return out


def cover_crop(img: np.ndarray, w: int, h: int) -> np.ndarray:
    """Resize so the image covers w x h, then centre-crop to exactly w x h."""
    ih, iw = img.shape[:2]
    k = max(w / iw, h / ih)
    nw, nh = max(w, round(iw * k)), max(h, round(ih * k))
    r = cv2.resize(img, (nw, nh), interpolation=cv2.INTER_AREA if k < 1 else cv2.INTER_LINEAR)
    y, x = (nh - h) // 2, (nw - w) // 2
    return np.ascontiguousarray(r[y:y + h, x:x + w])


def add_noise(img: np.ndarray, sigma: float, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return np.clip(img.astype(np.float32) + rng.normal(0, sigma, img.shape), 0, 255).round().astype(np.uint8)
