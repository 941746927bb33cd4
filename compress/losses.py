"""Perceptual losses (Johnson et al. 2016; Gatys et al. 2016 for the Gram style term)."""
from __future__ import annotations

import torch


def gram(f: torch.Tensor) -> torch.Tensor:
    # f: (N, C, H, W) -> (N, C, C), normalised by C*H*W (Johnson et al. 2016, eq. 3)
    n, c, h, w = f.shape
    flat = f.reshape(n, c, h * w)
    return flat @ flat.transpose(1, 2) / (c * h * w)


def content_loss(f_out: torch.Tensor, f_ref: torch.Tensor) -> torch.Tensor:
    """Feature reconstruction loss: squared Euclidean distance / (C*H*W), batch mean."""
    # f_out, f_ref: (N, C, H, W) -> scalar
    return ((f_out - f_ref) ** 2).mean()


def style_loss_layer(f_out: torch.Tensor, g_style: torch.Tensor) -> torch.Tensor:
    """Squared Frobenius norm of the Gram difference, batch mean."""
    # f_out: (N, C, H, W); g_style: (1 or N, C, C) -> scalar
    d = gram(f_out) - g_style
    return (d ** 2).sum(dim=(1, 2)).mean()


def tv_loss(y: torch.Tensor) -> torch.Tensor:
    """Total variation (squared neighbour differences, mean), a smoothness prior."""
    # y: (N, 3, H, W) -> scalar
    dh = y[:, :, 1:, :] - y[:, :, :-1, :]
    dw = y[:, :, :, 1:] - y[:, :, :, :-1]
    return (dh ** 2).mean() + (dw ** 2).mean()
