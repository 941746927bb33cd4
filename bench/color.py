"""Colour difference: CIEDE2000 and S-CIELAB (numpy/OpenCV, no torch).

- sRGB decoding and the sRGB -> XYZ (D65) matrix: IEC 61966-2-1.
- CIELAB: CIE 15 with the D65 white point.
- CIEDE2000: Sharma, Wu & Dalal 2005 (the formulas and test data of that paper).
- S-CIELAB: Zhang & Wandell 1997. The opponent matrix and the filter weights and
  spreads below are FROM MEMORY of their published filters (docs/architecture.md), not checked
  against the paper here. The spread s of each Gaussian is in degrees of visual angle
  and enters as exp(-(x^2 + y^2) / s^2), i.e. a standard deviation of s / sqrt(2);
  that reading of "spread" is also from memory.
"""
from __future__ import annotations

import math

import cv2
import numpy as np

SRGB_TO_XYZ = np.array([[0.4124, 0.3576, 0.1805],
                        [0.2126, 0.7152, 0.0722],
                        [0.0193, 0.1192, 0.9505]])
WHITE_D65 = np.array([0.95047, 1.0, 1.08883])

# Zhang & Wandell 1997 (from memory): XYZ -> opponent (O1 luminance, O2 red-green, O3 blue-yellow)
XYZ_TO_OPP = np.array([[0.279, 0.72, -0.107],
                       [-0.449, 0.29, -0.077],
                       [0.086, -0.59, 0.501]])
OPP_TO_XYZ = np.linalg.inv(XYZ_TO_OPP)
# per channel: (weights, spreads in degrees), from memory
SCIELAB_FILTERS = (((1.00327, 0.114416, -0.117686), (0.05, 0.225, 7.0)),
                   ((0.616725, 0.383275), (0.0685, 0.826)),
                   ((0.567885, 0.432115), (0.0920, 0.6451)))


def srgb_to_linear(v: np.ndarray) -> np.ndarray:
    v = np.asarray(v, np.float64)
    return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)


def bgr8_to_xyz(img: np.ndarray) -> np.ndarray:
    """(H, W, 3) uint8 BGR -> (H, W, 3) XYZ with Y of white = 1."""
    rgb = srgb_to_linear(img[:, :, ::-1].astype(np.float64) / 255.0)
    return rgb @ SRGB_TO_XYZ.T


def xyz_to_lab(xyz: np.ndarray, white: np.ndarray = WHITE_D65) -> np.ndarray:
    t = xyz / white
    d = 6.0 / 29.0
    f = np.where(t > d ** 3, np.cbrt(t), t / (3 * d * d) + 4.0 / 29.0)
    return np.stack([116 * f[..., 1] - 16, 500 * (f[..., 0] - f[..., 1]),
                     200 * (f[..., 1] - f[..., 2])], axis=-1)


def ciede2000(lab1: np.ndarray, lab2: np.ndarray, kl: float = 1.0, kc: float = 1.0,
              kh: float = 1.0) -> np.ndarray:
    """CIEDE2000 colour difference, element-wise over (..., 3) Lab arrays."""
    L1, a1, b1 = np.moveaxis(np.asarray(lab1, np.float64), -1, 0)
    L2, a2, b2 = np.moveaxis(np.asarray(lab2, np.float64), -1, 0)
    c1, c2 = np.hypot(a1, b1), np.hypot(a2, b2)
    cbar7 = ((c1 + c2) / 2) ** 7
    g = 0.5 * (1 - np.sqrt(cbar7 / (cbar7 + 25.0 ** 7)))
    a1p, a2p = (1 + g) * a1, (1 + g) * a2
    c1p, c2p = np.hypot(a1p, b1), np.hypot(a2p, b2)
    h1p = np.degrees(np.arctan2(b1, a1p)) % 360
    h2p = np.degrees(np.arctan2(b2, a2p)) % 360
    h1p = np.where((a1p == 0) & (b1 == 0), 0.0, h1p)
    h2p = np.where((a2p == 0) & (b2 == 0), 0.0, h2p)
    dLp = L2 - L1
    dCp = c2p - c1p
    dh = h2p - h1p
    zero = (c1p * c2p) == 0
    dh = np.where(zero, 0.0, np.where(dh > 180, dh - 360, np.where(dh < -180, dh + 360, dh)))
    dHp = 2 * np.sqrt(c1p * c2p) * np.sin(np.radians(dh) / 2)
    Lbp = (L1 + L2) / 2
    Cbp = (c1p + c2p) / 2
    hsum = h1p + h2p
    hbp = np.where(zero, hsum,
                   np.where(np.abs(h1p - h2p) <= 180, hsum / 2,
                            np.where(hsum < 360, (hsum + 360) / 2, (hsum - 360) / 2)))
    t = (1 - 0.17 * np.cos(np.radians(hbp - 30)) + 0.24 * np.cos(np.radians(2 * hbp))
         + 0.32 * np.cos(np.radians(3 * hbp + 6)) - 0.20 * np.cos(np.radians(4 * hbp - 63)))
    dtheta = 30 * np.exp(-(((hbp - 275) / 25) ** 2))
    rc = 2 * np.sqrt(Cbp ** 7 / (Cbp ** 7 + 25.0 ** 7))
    sl = 1 + 0.015 * (Lbp - 50) ** 2 / np.sqrt(20 + (Lbp - 50) ** 2)
    sc = 1 + 0.045 * Cbp
    sh = 1 + 0.015 * Cbp * t
    rt = -np.sin(np.radians(2 * dtheta)) * rc
    return np.sqrt((dLp / (kl * sl)) ** 2 + (dCp / (kc * sc)) ** 2 + (dHp / (kh * sh)) ** 2
                   + rt * (dCp / (kc * sc)) * (dHp / (kh * sh)))


def _kernel_1d(sigma_px: float, radius: int) -> np.ndarray:
    x = np.arange(-radius, radius + 1, dtype=np.float64)
    k = np.exp(-(x ** 2) / (2 * sigma_px ** 2)) if sigma_px > 1e-6 else (x == 0).astype(np.float64)
    return k / k.sum()


def scielab_kernels(ppd: float, max_radius: int) -> list[list[tuple[float, np.ndarray]]]:
    """Per opponent channel: [(weight, 1-D kernel)], each Gaussian normalised to sum 1 and
    the weights normalised to sum 1, so each channel's 2-D filter sums to 1."""
    out = []
    for weights, spreads in SCIELAB_FILTERS:
        wsum = sum(weights)
        comps = []
        for w, s in zip(weights, spreads):
            sigma = s * ppd / math.sqrt(2)
            radius = int(min(max(1, math.ceil(3 * sigma)), max_radius))
            comps.append((w / wsum, _kernel_1d(sigma, radius)))
        out.append(comps)
    return out


def _spatial_opponent(img_bgr: np.ndarray, ppd: float) -> np.ndarray:
    opp = bgr8_to_xyz(img_bgr) @ XYZ_TO_OPP.T
    h, w = opp.shape[:2]
    max_r = max(1, min(h, w) // 2 - 1)  # kernels wider than the image are truncated
    out = np.zeros_like(opp)
    for c, comps in enumerate(scielab_kernels(ppd, max_r)):
        ch = np.ascontiguousarray(opp[:, :, c])
        for weight, k in comps:
            out[:, :, c] += weight * cv2.sepFilter2D(ch, cv2.CV_64F, k, k, borderType=cv2.BORDER_REFLECT)
    return out


def scielab_delta_e(a_bgr: np.ndarray, b_bgr: np.ndarray, ppd: float) -> float:
    """Mean S-CIELAB CIEDE2000 difference between two uint8 BGR images at `ppd`."""
    if a_bgr.shape != b_bgr.shape:
        raise ValueError(f"images differ in shape: {a_bgr.shape} vs {b_bgr.shape}")
    la = xyz_to_lab(_spatial_opponent(a_bgr, ppd) @ OPP_TO_XYZ.T)
    lb = xyz_to_lab(_spatial_opponent(b_bgr, ppd) @ OPP_TO_XYZ.T)
    return float(ciede2000(la, lb).mean())
