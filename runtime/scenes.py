"""Procedurally generated scenes of our own: sky gradients, hills, buildings, discs,
stripes and noise textures: `scenes:N` content, which can widen a distillation set (the
teacher makes the targets, so any image is a valid input). The demo clip is the real street
video (runtime/demo_clip.py). Torch-free."""
from __future__ import annotations

import cv2
import numpy as np


def _gradient(h: int, w: int, top: np.ndarray, bottom: np.ndarray) -> np.ndarray:
    t = np.linspace(0, 1, h, dtype=np.float32)[:, None, None]
    return (top[None, None] * (1 - t) + bottom[None, None] * t).repeat(w, axis=1)


def scene(seed: int, width: int = 512, height: int = 384) -> np.ndarray:
    """One seeded scene, (height, width, 3) uint8 BGR."""
    rng = np.random.default_rng([20261202, seed])
    img = _gradient(height, width, rng.uniform(60, 255, 3), rng.uniform(0, 200, 3))
    img = np.ascontiguousarray(img)
    # rolling hills
    for layer in range(int(rng.integers(1, 4))):
        xs = np.arange(width, dtype=np.float32)
        base = height * rng.uniform(0.45, 0.85)
        y = base + sum(rng.uniform(5, 40) * np.sin(xs / rng.uniform(20, 200) + rng.uniform(0, 6))
                       for _ in range(3))
        pts = np.concatenate([np.stack([xs, y], 1), [[width, height], [0, height]]]).astype(np.int32)
        cv2.fillPoly(img, [pts], tuple(float(c) for c in rng.uniform(0, 220, 3)))
    # buildings, discs, stripes
    for _ in range(int(rng.integers(3, 12))):
        kind = rng.integers(3)
        col = tuple(float(c) for c in rng.uniform(0, 255, 3))
        if kind == 0:
            x0, w0 = int(rng.integers(0, width)), int(rng.integers(15, width // 4))
            top = int(rng.integers(height // 5, height - 20))
            cv2.rectangle(img, (x0, top), (x0 + w0, height), col, -1)
            for wy in range(top + 6, height - 6, 14):  # windows
                for wx in range(x0 + 4, x0 + w0 - 6, 10):
                    if rng.random() < 0.6:
                        cv2.rectangle(img, (wx, wy), (wx + 4, wy + 6),
                                      tuple(float(c) for c in rng.uniform(150, 255, 3)), -1)
        elif kind == 1:
            c = (int(rng.integers(0, width)), int(rng.integers(0, height)))
            cv2.circle(img, c, int(rng.integers(5, height // 4)), col, -1, cv2.LINE_AA)
        else:
            p1 = (int(rng.integers(0, width)), int(rng.integers(0, height)))
            p2 = (int(rng.integers(0, width)), int(rng.integers(0, height)))
            cv2.line(img, p1, p2, col, int(rng.integers(2, 12)), cv2.LINE_AA)
    # fine texture and soft lighting
    noise = rng.normal(0, rng.uniform(2, 10), (height // 4, width // 4, 1)).astype(np.float32)
    img += cv2.resize(noise, (width, height), interpolation=cv2.INTER_CUBIC)[:, :, None]
    img += rng.normal(0, 2.0, img.shape).astype(np.float32)
    return np.clip(img, 0, 255).astype(np.uint8)
