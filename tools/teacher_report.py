"""Measure a trained teacher on held-out photos against its own untrained start.

Reports, per held-out image and on average: the style loss (same loss network, style
image and layer weights as training) of the trained and of the untrained network
(same seed), their ratio, and two content checks: the content loss ratio and the SSIM
between the blurred luminance of the photo and of the stylised output (structure kept).
Also writes a side-by-side PNG: photo | style | result.

Usage: python tools/teacher_report.py RUN/checkpoint.pt --content PHOTOS... --png docs/x.png
"""
from __future__ import annotations

import argparse
import json
from pathlib import Path

import cv2
import numpy as np
import torch

from limner.bench.metrics import ssim
from limner.compress import checkpoint as ck
from limner.compress.lossnet import build_loss_net
from limner.compress.registry import build
from limner.runtime.images import write_image
from limner.runtime.styles import style_image
from limner.compress.train import PerceptualLoss, TrainConfig, to_tensor
from limner.runtime import config as cfgmod


def stylise(net, bgr: np.ndarray) -> np.ndarray:
    with torch.no_grad():
        y = net(to_tensor(bgr[None, :, :, ::-1].copy()))[0].permute(1, 2, 0).numpy()
    return (y[:, :, ::-1] * 255 + 0.5).clip(0, 255).astype(np.uint8)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("checkpoint", type=Path)
    ap.add_argument("--content", nargs="+", required=True)
    ap.add_argument("--png", type=Path)
    ap.add_argument("--size", type=int, default=256)
    a = ap.parse_args()
    c = ck.load(a.checkpoint)
    cfg = cfgmod.from_dict(TrainConfig, c.meta["config"])
    trained = c.model()
    torch.manual_seed(cfg.seed)
    untrained = build("teacher").eval()
    style_bgr, _ = style_image(c.meta["style"])
    net, _ = build_loss_net(cfg.loss_net, Path(cfg.loss_weights) if cfg.loss_weights else None, cfg.loss_seed)
    loss = PerceptualLoss(cfg, net, np.ascontiguousarray(style_bgr[:, :, ::-1]))
    rows, tiles = [], []
    for p in a.content:
        img = cv2.imread(p)
        h, w = img.shape[:2]
        s = min(h, w)
        img = cv2.resize(img[(h - s) // 2:(h - s) // 2 + s, (w - s) // 2:(w - s) // 2 + s], (a.size, a.size),
                         interpolation=cv2.INTER_AREA)
        x = to_tensor(img[None, :, :, ::-1].copy())
        out = {}
        for name, model in (("trained", trained), ("untrained", untrained)):
            with torch.no_grad():
                t = loss.terms(model(x), x)
            out[name] = {"style": float(sum(t[k] for k in t if k.startswith("style_")) / 4),
                         "content": float(t["content"])}
        y = stylise(trained, img)
        luma = lambda b: cv2.GaussianBlur(cv2.cvtColor(b, cv2.COLOR_BGR2GRAY), (0, 0), 2.0)  # noqa: E731
        rows.append({"image": Path(p).name, **{f"{k}_{m}": v for k, d in out.items() for m, v in d.items()},
                     "style_ratio": out["trained"]["style"] / out["untrained"]["style"],
                     "content_ratio": out["trained"]["content"] / out["untrained"]["content"],
                     "blurred_luma_ssim": ssim(luma(img), luma(y)),
                     "blurred_luma_ssim_untrained": ssim(luma(img), luma(stylise(untrained, img)))})
        tiles.append(np.concatenate([img, cv2.resize(style_bgr, (a.size, a.size), interpolation=cv2.INTER_AREA), y], 1))
    print(json.dumps(rows, indent=1))
    print("mean style ratio %.3f, mean content ratio %.3f, mean blurred-luma SSIM %.3f" % (
        np.mean([r["style_ratio"] for r in rows]), np.mean([r["content_ratio"] for r in rows]),
        np.mean([r["blurred_luma_ssim"] for r in rows])))
    if a.png:
        a.png.parent.mkdir(parents=True, exist_ok=True)
        write_image(a.png, np.concatenate(tiles, 0))


if __name__ == "__main__":
    main()
