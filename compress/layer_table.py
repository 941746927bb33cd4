"""Every layer type our networks use, once: how the ONNX writer emits it and how it changes
the frame size and adds multiply-accumulates (compress/macs.py). To add a layer type, add
one entry to LAYERS here; the writer and the MAC counter both read it.

Convolution MACs = H_out * W_out * C_out * (C_in / groups) * k_h * k_w (bias adds, norms,
activations and resizes are not counted: common practice, no source).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import onnx
from onnx import helper, numpy_helper
from torch import nn

from .layers import FrameFiLM, NearestUp2, Residual, Squash

WeightFix = Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]]
Fixes = dict[int, WeightFix]   # id(conv) -> its export fix (channel order, scaling)


class Graph:
    """The nodes and initializers being written; every layer's emitter (below) adds to it through `const` and `op`."""

    def __init__(self) -> None:
        self.nodes: list[onnx.NodeProto] = []
        self.inits: list[onnx.TensorProto] = []
        self.n = 0

    def name(self, base: str) -> str:
        self.n += 1
        return f"{base}_{self.n}"

    def const(self, base: str, value: np.ndarray) -> str:
        n = self.name(base)
        self.inits.append(numpy_helper.from_array(np.ascontiguousarray(value), n))
        return n

    def op(self, op_type: str, inputs: list[str], base: str | None = None, **attrs) -> str:
        out = self.name(base or op_type.lower())
        self.nodes.append(helper.make_node(op_type, inputs, [out], name=out, **attrs))
        return out


class Polyphase(nn.Module):
    """Marks a full-resolution last conv with few outputs (the teacher's 9x9 conv to RGB)
    to be written as its 2x2 polyphase form: SpaceToDepth(2), a conv of kernel (k+1)/2
    from 4 Cin to 4 Cout channels at half resolution, and the output's DepthToSpace.
    Exact (the same sums, regrouped). onnxruntime's blocked convolutions pad output
    channels to blocks of 8, so 3 outputs waste most of each block; 12 waste less:
    measured here, 16 -> 3 channels 9x9 at 640x360 took 107 ms directly and 52 ms in
    this form, with 23% more multiply-adds."""

    def __init__(self, conv: nn.Conv2d) -> None:
        super().__init__()
        self.conv = conv


def polyphase_ok(conv: nn.Module) -> bool:
    k = conv.kernel_size[0] if isinstance(conv, nn.Conv2d) else 0
    return (isinstance(conv, nn.Conv2d) and conv.kernel_size == (k, k) and k % 2 == 1 and k >= 5
            and conv.stride == (1, 1) and conv.dilation == (1, 1) and conv.groups == 1
            and conv.padding == (k // 2, k // 2) and conv.out_channels <= 4)


def polyphase_weights(w: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(Cout, Cin, k, k) -> (4 Cout, 4 Cin, K, K), K = (k + 1) / 2. Output channel
    (p 2 + q) Cout + o is output pixel (2i + p, 2j + q) in DepthToSpace DCR order; input
    channel (r 2 + s) Cin + c is input pixel (2i + r, 2j + s) in SpaceToDepth order."""
    co, ci, k, _ = w.shape
    big = (k + 1) // 2
    w2 = np.zeros((4 * co, 4 * ci, big, big), np.float64)
    for p in range(2):
        for q in range(2):
            for u in range(k):
                for v in range(k):
                    r, s = (p + u) % 2, (q + v) % 2
                    w2[(p * 2 + q) * co:(p * 2 + q + 1) * co, (r * 2 + s) * ci:(r * 2 + s + 1) * ci,
                       (p + u) // 2, (q + v) // 2] += w[:, :, u, v]
    return w2.astype(np.float32), np.tile(b, 4).astype(np.float32)


def execution_order(module: nn.Module) -> list[nn.Module]:
    """Leaf layers in forward order (our nets are Sequentials with Residual wrappers)."""
    if isinstance(module, nn.Sequential):
        return [m for child in module for m in execution_order(child)]
    if isinstance(module, Residual):
        return execution_order(module.body)
    return [module]


def conv_params(m: nn.Conv2d, fixes: Fixes) -> tuple[np.ndarray, np.ndarray]:
    """A conv's weight and bias as float32 arrays, with its export fix applied."""
    w = m.weight.detach().cpu().numpy().astype(np.float32)
    b = (m.bias.detach().cpu().numpy() if m.bias is not None else np.zeros(w.shape[0])).astype(np.float32)
    return fixes[id(m)](w, b) if id(m) in fixes else (w, b)


def conv_macs(conv: nn.Conv2d, h_out: int, w_out: int) -> int:
    kh, kw = conv.kernel_size
    return h_out * w_out * conv.out_channels * (conv.in_channels // conv.groups) * kh * kw


# ---- emitters: (graph, layer, input name, fixes) -> output name ------------------------------

def _emit_sequential(g: Graph, m: nn.Sequential, x: str, fixes: Fixes) -> str:
    for child in m:
        x = emit(g, child, x, fixes)
    return x


def _emit_residual(g: Graph, m: Residual, x: str, fixes: Fixes) -> str:
    return g.op("Add", [x, emit(g, m.body, x, fixes)], "add")


def _emit_conv(g: Graph, m: nn.Conv2d, x: str, fixes: Fixes) -> str:
    w, b = conv_params(m, fixes)
    kh, kw = m.kernel_size
    ph, pw = m.padding if isinstance(m.padding, tuple) else (m.padding, m.padding)
    if m.padding_mode == "reflect" and (ph or pw):
        pads = g.const("pads", np.array([0, 0, ph, pw, 0, 0, ph, pw], np.int64))
        x = g.op("Pad", [x, pads], "pad", mode="reflect")
        ph = pw = 0
    elif m.padding_mode not in ("zeros", "reflect"):
        raise ValueError(f"padding mode {m.padding_mode!r} is not supported by the writer")
    return g.op("Conv", [x, g.const("w", w), g.const("b", b)], "conv",
                kernel_shape=[kh, kw], strides=list(m.stride), pads=[ph, pw, ph, pw],
                group=m.groups, dilations=list(m.dilation))


def _emit_polyphase(g: Graph, m: Polyphase, x: str, fixes: Fixes) -> str:
    c = m.conv
    w, b = polyphase_weights(*conv_params(c, fixes))
    p = c.padding[0]
    mode = "reflect" if c.padding_mode == "reflect" else "constant"
    x = g.op("Pad", [x, g.const("pads", np.array([0, 0, p, p, 0, 0, p, p], np.int64))], "pad", mode=mode)
    x = g.op("SpaceToDepth", [x], "phases", blocksize=2)        # (N, 4 Cin, H/2 + p, W/2 + p)
    return g.op("Conv", [x, g.const("w", w), g.const("b", b)], "conv",
                kernel_shape=list(w.shape[2:]), pads=[0, 0, 0, 0])  # (N, 4 Cout, H/2, W/2)


def _emit_instance_norm(g: Graph, m: nn.InstanceNorm2d, x: str, fixes: Fixes) -> str:
    return g.op("InstanceNormalization",
                [x, g.const("in_scale", m.weight.detach().numpy().astype(np.float32)),
                 g.const("in_bias", m.bias.detach().numpy().astype(np.float32))],
                "inorm", epsilon=float(m.eps))


def _emit_up2(g: Graph, m: NearestUp2, x: str, fixes: Fixes) -> str:
    scales = g.const("scales", np.array([1, 1, 2, 2], np.float32))
    return g.op("Resize", [x, "", scales], "up", mode="nearest",
                coordinate_transformation_mode="asymmetric", nearest_mode="floor")


def _emit_shuffle(g: Graph, m: nn.PixelShuffle, x: str, fixes: Fixes) -> str:
    # DCR moves whole channel planes (faster in onnxruntime than torch's CRD order);
    # the conv before it emits its channels in DCR order (onnx_writer._dcr_fix)
    return g.op("DepthToSpace", [x], "shuffle", blocksize=m.upscale_factor, mode="DCR")


def _emit_unshuffle(g: Graph, m: nn.PixelUnshuffle, x: str, fixes: Fixes) -> str:
    # ONNX SpaceToDepth orders channels (block, c); torch orders (c, block): the
    # next conv's input channels are permuted to match (onnx_writer._first_conv_fix).
    return g.op("SpaceToDepth", [x], "unshuffle", blocksize=m.downscale_factor)


def _emit_film(g: Graph, m: FrameFiLM, x: str, fixes: Fixes) -> str:
    stats = g.op("GlobalAveragePool", [x], "frame_mean")
    t = emit(g, m.squeeze, stats, fixes)
    if m.spread is not None:  # sqrt(max(E[x^2] - E[x]^2, 0) + eps) - sqrt(eps), as FrameFiLM.pool
        sq = g.op("GlobalAveragePool", [g.op("Mul", [x, x], "square")], "frame_square")
        var = g.op("Relu", [g.op("Sub", [sq, g.op("Mul", [stats, stats], "mean_square")], "var")], "var")
        root = g.op("Sqrt", [g.op("Add", [var, g.const("eps", np.array(m.EPS, np.float32))], "var_eps")])
        std = g.op("Sub", [root, g.const("root_eps", np.array(m.EPS ** 0.5, np.float32))], "frame_std")
        t = g.op("Add", [t, emit(g, m.spread, std, fixes)], "spread_add")
    t = g.op("Relu", [t], "relu")
    one_plus = {id(m.gamma): lambda w, b: (w, b + np.float32(1.0))}  # 1 + gamma, in the bias
    scale = emit(g, m.gamma, t, one_plus)
    return g.op("Add", [g.op("Mul", [x, scale], "film_scale"), emit(g, m.beta, t, fixes)], "film_shift")


# ---- sizes and MACs: (layer, h, w) -> (h_out, w_out, conv MACs) ------------------------------

def _same(m: nn.Module, h: int, w: int) -> tuple[int, int, int]:
    return h, w, 0


def _conv_size(m: nn.Conv2d, h: int, w: int) -> tuple[int, int, int]:
    (sh, sw), (ph, pw), (kh, kw) = m.stride, m.padding, m.kernel_size
    h, w = (h + 2 * ph - kh) // sh + 1, (w + 2 * pw - kw) // sw + 1
    return h, w, conv_macs(m, h, w)


@dataclass(frozen=True)
class LayerOps:
    emit: Callable[..., str]                          # (graph, layer, x, fixes) -> output name
    size: Callable[..., tuple[int, int, int]]         # (layer, h, w) -> (h_out, w_out, MACs)


def _container(m: nn.Module, h: int, w: int) -> tuple[int, int, int]:
    raise TypeError("containers are walked by execution_order, not sized")


LAYERS: dict[type[nn.Module], LayerOps] = {
    nn.Sequential: LayerOps(_emit_sequential, _container),
    Residual: LayerOps(_emit_residual, _container),
    nn.Conv2d: LayerOps(_emit_conv, _conv_size),
    Polyphase: LayerOps(_emit_polyphase, lambda m, h, w: _conv_size(m.conv, h, w)),
    nn.InstanceNorm2d: LayerOps(_emit_instance_norm, _same),
    nn.ReLU: LayerOps(lambda g, m, x, fixes: g.op("Relu", [x], "relu"), _same),
    NearestUp2: LayerOps(_emit_up2, lambda m, h, w: (2 * h, 2 * w, 0)),
    nn.PixelShuffle: LayerOps(_emit_shuffle, lambda m, h, w: (h * m.upscale_factor, w * m.upscale_factor, 0)),
    nn.PixelUnshuffle: LayerOps(_emit_unshuffle,
                                lambda m, h, w: (h // m.downscale_factor, w // m.downscale_factor, 0)),
    Squash: LayerOps(lambda g, m, x, fixes: g.op("Sigmoid", [x], "squash"), _same),
    # the frame context's 1x1 convs run on one pooled vector per frame: not counted
    FrameFiLM: LayerOps(_emit_film, _same),
}


def ops(m: nn.Module) -> LayerOps:
    found = LAYERS.get(type(m))
    if found is None:
        raise ValueError(f"layer {type(m).__name__} is not in compress/layer_table.py LAYERS")
    return found


def emit(g: Graph, m: nn.Module, x: str, fixes: Fixes) -> str:
    """Write layer `m` reading the tensor named `x`; returns its output's name."""
    return ops(m).emit(g, m, x, fixes)
