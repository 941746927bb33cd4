"""Differentiable MS-SSIM for distillation (Wang, Simoncelli & Bovik 2003), in torch.

Same window as the bench (11x11 Gaussian, sigma 1.5, valid region); at 160 px crops
only three scales fit, so the first three of the five published exponents are used,
renormalised to sum 1.
"""
from __future__ import annotations

import torch
import torch.nn.functional as F

_W = torch.tensor([0.0448, 0.2856, 0.3001, 0.2363, 0.1333])


def _window(device: torch.device, channels: int) -> torch.Tensor:
    x = torch.arange(11, dtype=torch.float32, device=device) - 5
    g = torch.exp(-(x ** 2) / (2 * 1.5 ** 2))
    g = g / g.sum()
    return (g[:, None] * g[None, :]).expand(channels, 1, 11, 11).contiguous()


def _ssim_cs(a: torch.Tensor, b: torch.Tensor, win: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    # a, b: (N, C, H, W) in [0, 1] -> per-(N, C) mean SSIM and contrast-structure
    c1, c2 = 0.01 ** 2, 0.03 ** 2
    g = lambda x: F.conv2d(x, win, groups=a.shape[1])  # noqa: E731
    mu_a, mu_b = g(a), g(b)
    saa = g(a * a) - mu_a ** 2
    sbb = g(b * b) - mu_b ** 2
    sab = g(a * b) - mu_a * mu_b
    cs = (2 * sab + c2) / (saa + sbb + c2)
    ssim = (2 * mu_a * mu_b + c1) / (mu_a ** 2 + mu_b ** 2 + c1) * cs
    return ssim.mean(dim=(2, 3)), cs.mean(dim=(2, 3))


def ms_ssim(a: torch.Tensor, b: torch.Tensor, scales: int | None = None) -> torch.Tensor:
    """Mean MS-SSIM over batch and channels; scales default to as many as fit."""
    # a, b: (N, C, H, W) in [0, 1] -> scalar
    if scales is None:
        scales, side = 1, min(a.shape[2:])
        while scales < 5 and side // 2 ** scales > 10:
            scales += 1
    w = _W[:scales] / _W[:scales].sum()
    win = _window(a.device, a.shape[1])
    vals = []
    for s in range(scales):
        ssim, cs = _ssim_cs(a, b, win)
        vals.append(torch.relu(ssim if s == scales - 1 else cs))
        if s < scales - 1:
            a, b = F.avg_pool2d(a, 2), F.avg_pool2d(b, 2)
    out = torch.ones_like(vals[0])
    for v, wi in zip(vals, w):
        out = out * (v + 1e-8) ** wi
    return out.mean()
