"""Structural and signal fidelity metrics in numpy/OpenCV (no torch).

- SSIM: Wang, Bovik, Sheikh & Simoncelli 2004: 11x11 Gaussian window, sigma 1.5,
  K1 = 0.01, K2 = 0.03, population covariances, computed per channel and averaged;
  the 5-pixel border where the window leaves the image is excluded (as scikit-image does).
- MS-SSIM: Wang, Simoncelli & Bovik 2003: five scales, exponents 0.0448, 0.2856,
  0.3001, 0.2363, 0.1333; contrast-structure at scales 1-4, full SSIM at scale 5,
  2x2 average downsampling between scales; negative per-scale values clipped to 0.
- PSNR: 10 log10(255^2 / MSE) over all pixels and channels.
"""
from __future__ import annotations

import cv2
import numpy as np

K1, K2, SIGMA, WIN = 0.01, 0.03, 1.5, 11
MS_WEIGHTS = np.array([0.0448, 0.2856, 0.3001, 0.2363, 0.1333])
_GAUSS = cv2.getGaussianKernel(WIN, SIGMA, cv2.CV_64F)


def _filter(x: np.ndarray) -> np.ndarray:
    return cv2.sepFilter2D(x, cv2.CV_64F, _GAUSS, _GAUSS, borderType=cv2.BORDER_REFLECT)


def _ssim_maps(a: np.ndarray, b: np.ndarray, data_range: float) -> tuple[np.ndarray, np.ndarray]:
    """Per-pixel SSIM and contrast-structure maps of one 2-D channel (valid region only)."""
    c1, c2 = (K1 * data_range) ** 2, (K2 * data_range) ** 2
    mu_a, mu_b = _filter(a), _filter(b)
    saa = _filter(a * a) - mu_a * mu_a
    sbb = _filter(b * b) - mu_b * mu_b
    sab = _filter(a * b) - mu_a * mu_b
    cs = (2 * sab + c2) / (saa + sbb + c2)
    lum = (2 * mu_a * mu_b + c1) / (mu_a * mu_a + mu_b * mu_b + c1)
    p = WIN // 2
    return (lum * cs)[p:-p, p:-p], cs[p:-p, p:-p]


def _channels(img: np.ndarray) -> list[np.ndarray]:
    img = img.astype(np.float64)
    return [img] if img.ndim == 2 else [img[:, :, c] for c in range(img.shape[2])]


def ssim_map(a: np.ndarray, b: np.ndarray, data_range: float = 255.0) -> np.ndarray:
    """Per-pixel SSIM over the valid region (5 px in from each edge), averaged over channels."""
    _check(a, b)
    return np.mean([_ssim_maps(x, y, data_range)[0] for x, y in zip(_channels(a), _channels(b))], axis=0)


def ssim(a: np.ndarray, b: np.ndarray, data_range: float = 255.0) -> float:
    """Mean SSIM over the valid region, averaged over channels."""
    return float(ssim_map(a, b, data_range).mean())


def _down2(x: np.ndarray) -> np.ndarray:
    """2x2 average pooling; odd sides are zero-padded by one (as avg_pool2d with padding)."""
    h, w = x.shape
    ph, pw = h % 2, w % 2
    if ph or pw:
        x = np.pad(x, ((ph, ph), (pw, pw)))
        h, w = x.shape
        x = x[: h - h % 2, : w - w % 2]
        h, w = x.shape
    return x.reshape(h // 2, 2, w // 2, 2).mean(axis=(1, 3))


def ms_ssim_scales(a: np.ndarray, b: np.ndarray, data_range: float = 255.0) -> np.ndarray:
    """The five per-scale terms of MS-SSIM for each channel -> (channels, 5): contrast-structure
    at scales 1-4 (finest first), full SSIM at scale 5, each clipped to 0. Where fidelity is
    lost: low fine scales with high coarse ones is texture phase, low coarse ones is layout."""
    _check(a, b)
    if min(a.shape[:2]) <= (WIN - 1) * 2 ** 4:
        raise ValueError(f"MS-SSIM needs a short side above {(WIN - 1) * 16} px, got {min(a.shape[:2])}")
    rows = []
    for x, y in zip(_channels(a), _channels(b)):
        per_scale = []
        for s in range(len(MS_WEIGHTS)):
            full, cs = _ssim_maps(x, y, data_range)
            per_scale.append(max(full.mean(), 0.0) if s == len(MS_WEIGHTS) - 1 else max(cs.mean(), 0.0))
            if s < len(MS_WEIGHTS) - 1:
                x, y = _down2(x), _down2(y)
        rows.append(per_scale)
    return np.array(rows, dtype=np.float64)


def ms_ssim(a: np.ndarray, b: np.ndarray, data_range: float = 255.0) -> float:
    """Five-scale MS-SSIM, per channel, then averaged over channels."""
    return float(np.mean(np.prod(ms_ssim_scales(a, b, data_range) ** MS_WEIGHTS, axis=1)))


def psnr(a: np.ndarray, b: np.ndarray, data_range: float = 255.0) -> float:
    _check(a, b)
    mse = float(np.mean((a.astype(np.float64) - b.astype(np.float64)) ** 2))
    return float("inf") if mse == 0 else 10.0 * np.log10(data_range ** 2 / mse)


def _check(a: np.ndarray, b: np.ndarray) -> None:
    if a.shape != b.shape:
        raise ValueError(f"images differ in shape: {a.shape} vs {b.shape}")
