"""Turning held-out images into identical model inputs for every candidate (the geometry
itself is runtime/images.py, shared with the live runtime)."""
from __future__ import annotations

import numpy as np


def add_noise(img: np.ndarray, sigma: float, seed: int) -> np.ndarray:
    """Camera-like Gaussian noise of `sigma` grey levels, seeded."""
    rng = np.random.default_rng(seed)
    return np.clip(img.astype(np.float32) + rng.normal(0, sigma, img.shape), 0, 255).round().astype(np.uint8)
