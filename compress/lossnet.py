"""The fixed loss network: VGG-16 features up to relu4_3 (Johnson et al. 2016).

Weight sources, tried in this order (never a silent fallback):
  1. a file given by the user (state dict in the common PyTorch layout,
     `features.N.weight` / `features.N.bias`; classifier keys are ignored);
  2. the local PyTorch hub cache file;
  3. a download, when online (fails within seconds offline, saying how to supply the file);
or `random`, chosen explicitly: seeded random-weight features (He et al. 2016 and
Ustyuzhaninov et al. 2017 showed random features carry texture statistics).
"""
from __future__ import annotations

import os
import urllib.request
from dataclasses import dataclass
from pathlib import Path

import torch
import torch.nn.functional as F
from torch import nn
from limner.runtime.hashing import file_sha256 as _sha256

# (in, out) channels of VGG-16's convs up to conv4_3, with their `features.N` indices.
_CONVS = [(0, 3, 64), (2, 64, 64), (5, 64, 128), (7, 128, 128), (10, 128, 256),
          (12, 256, 256), (14, 256, 256), (17, 256, 512), (19, 512, 512), (21, 512, 512)]
_POOL_AFTER = {2, 7, 14}  # max-pool follows features.3, .8, .15
# Output taps: feature index of the ReLU -> name (Johnson et al. 2016).
TAPS = {3: "relu1_2", 8: "relu2_2", 15: "relu3_3", 22: "relu4_3"}
STYLE_LAYERS = ("relu1_2", "relu2_2", "relu3_3", "relu4_3")
CONTENT_LAYER = "relu2_2"

# ImageNet statistics used by the common PyTorch VGG weights (common practice, no source).
IMAGENET_MEAN = (0.485, 0.456, 0.406)
IMAGENET_STD = (0.229, 0.224, 0.225)

HUB_FILE = "vgg16-397923af.pth"
HUB_URL = "https://download.pytorch.org/models/" + HUB_FILE


class LossNetError(Exception):
    pass


@dataclass(frozen=True)
class LossNetSource:
    kind: str     # "file" | "hub-cache" | "download" | "random"
    detail: str   # path, URL or seed
    sha256: str   # of the weight file; empty for random

    def describe(self) -> str:
        if self.kind == "random":
            return f"vgg16-random:seed={self.detail}"
        return f"vgg16-{self.kind}:sha256={self.sha256}"


class VGG16Features(nn.Module):
    """VGG-16 conv layers up to relu4_3, returning the four tap activations."""

    def __init__(self) -> None:
        super().__init__()
        self.convs = nn.ModuleDict({str(i): nn.Conv2d(cin, cout, 3, padding=1)
                                    for i, cin, cout in _CONVS})
        self.register_buffer("mean", torch.tensor(IMAGENET_MEAN).view(1, 3, 1, 1))
        self.register_buffer("std", torch.tensor(IMAGENET_STD).view(1, 3, 1, 1))
        for p in self.parameters():
            p.requires_grad_(False)

    def forward(self, x: torch.Tensor, upto: str = "relu4_3") -> dict[str, torch.Tensor]:
        # x: (N, 3, H, W) RGB in [0, 1] -> {tap: (N, C_tap, H / 2^k, W / 2^k)}
        h = (x - self.mean) / self.std
        out: dict[str, torch.Tensor] = {}
        for i, _, _ in _CONVS:
            h = F.relu(self.convs[str(i)](h))
            tap = TAPS.get(i + 1)
            if tap:
                out[tap] = h
                if tap == upto:
                    break
            if i in _POOL_AFTER:
                h = F.max_pool2d(h, 2)
        return out



def load_state_dict_into(net: VGG16Features, state: dict, origin: str) -> None:
    """Copy `features.N.weight/bias` from a VGG-16 state dict; other keys are ignored."""
    for i, cin, cout in _CONVS:
        for part, shape in (("weight", (cout, cin, 3, 3)), ("bias", (cout,))):
            key = f"features.{i}.{part}"
            if key not in state:
                raise LossNetError(f"{origin}: missing key {key!r}; expected a VGG-16 state dict "
                                   "in the common PyTorch layout (features.N.weight)")
            t = state[key]
            if not isinstance(t, torch.Tensor) or tuple(t.shape) != shape:
                got = tuple(t.shape) if isinstance(t, torch.Tensor) else type(t).__name__
                raise LossNetError(f"{origin}: {key} has shape {got}, expected {shape}")
            getattr(net.convs[str(i)], part).data.copy_(t.float())


def _load_file(net: VGG16Features, path: Path, kind: str) -> LossNetSource:
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as e:
        raise LossNetError(f"{path}: cannot read as a state dict ({str(e).splitlines()[0]})") from None
    if not isinstance(state, dict):
        raise LossNetError(f"{path}: not a state dict")
    load_state_dict_into(net, state, str(path))
    return LossNetSource(kind, str(path), _sha256(path))


def hub_cache_path() -> Path:
    return Path(torch.hub.get_dir()) / "checkpoints" / HUB_FILE


def random_features(net: VGG16Features, seed: int) -> None:
    """Seeded He-normal weights (He et al. 2015 init; fan-in, ReLU gain), zero biases."""
    g = torch.Generator().manual_seed(seed)
    for i, cin, _ in _CONVS:
        c = net.convs[str(i)]
        std = (2.0 / (cin * 9)) ** 0.5
        c.weight.data.copy_(torch.randn(c.weight.shape, generator=g) * std)
        c.bias.data.zero_()


def build_loss_net(source: str = "vgg16", weights: Path | None = None, seed: int = 0,
                   download_timeout_s: float = 5.0) -> tuple[VGG16Features, LossNetSource]:
    """source: "vgg16" (file, hub cache, then download) or "random" (explicit)."""
    net = VGG16Features()
    if source == "random":
        if weights is not None:
            raise LossNetError("--loss-weights was given with --loss-net random; choose one")
        random_features(net, seed)
        return net.eval(), LossNetSource("random", str(seed), "")
    if source != "vgg16":
        raise LossNetError(f"loss network {source!r}: expected 'vgg16' or 'random'")
    if weights is not None:
        weights = Path(weights)
        if not weights.is_file():
            raise LossNetError(f"{weights}: no such loss-network weight file")
        return net.eval(), _load_file(net, weights, "file")
    cached = hub_cache_path()
    if cached.is_file():
        return net.eval(), _load_file(net, cached, "hub-cache")
    try:
        cached.parent.mkdir(parents=True, exist_ok=True)
        tmp = cached.with_suffix(".part")
        with urllib.request.urlopen(HUB_URL, timeout=download_timeout_s) as r, open(tmp, "wb") as f:
            while chunk := r.read(1 << 20):
                f.write(chunk)
        os.replace(tmp, cached)
    except Exception as e:
        raise LossNetError(
            f"no VGG-16 weights: no --loss-weights file, none in the hub cache ({cached}), and the "
            f"download failed ({type(e).__name__}: {e}). Copy a VGG-16 state dict ({HUB_FILE}) to "
            "that path or pass --loss-weights FILE; or train offline with --loss-net random "
            "(random-weight features; recorded in the model's metadata).") from None
    return net.eval(), _load_file(net, cached, "download")
