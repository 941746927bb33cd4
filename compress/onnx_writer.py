"""Writes our networks as ONNX graphs directly (onnx.helper), layer by layer.

Why not torch.onnx: its exporters change between torch releases (the default became
the dynamo exporter, which needs onnxscript); our family is a handful of layer
types, so writing the graph ourselves works the same on any torch from 2.4 on and
gives exact control over the contract:

  input  uint8 (N, H, W, 3) BGR --Transpose, (SpaceToDepth), Cast--> float NCHW 0..255
  the first conv absorbs the BGR->RGB swap and the /255 (weights permuted, scaled)
  the last conv emits BGR (output channels permuted)
  Sigmoid -> *255 -> +0.5 -> Cast uint8 -> (DepthToSpace) -> Transpose (N, H, W, 3) BGR

The layout changes at both ends (a network's first PixelUnshuffle and last PixelShuffle
included) run on uint8, a quarter of the bytes of float (onnxruntime here: Transpose
0.32 against 0.71 ms, DepthToSpace 1.5 against 3.8 ms at 640x360; a few percent of a
small student's time in all). No Clip is needed: Sigmoid * 255 + 0.5 lies in (0.5, 255.5),
which the truncating Cast maps into 0..255. A full-resolution last conv with few outputs
(the teacher's 9x9 conv to RGB) is written in its exact 2x2 polyphase form (`_Polyphase`):
the bundled teacher ran 1,277 -> 1,155 ms per 640x360 frame here.
"""
from __future__ import annotations

from typing import Callable

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper
from torch import nn

from .layers import FrameFiLM, NearestUp2, Residual, Squash

OPSET = 17
IR_VERSION = 8  # the IR that goes with opset 17; loads on onnxruntime >= 1.14

WeightFix = Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]]


class _Graph:
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


class _Polyphase(nn.Module):
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


def _polyphase_ok(conv: nn.Module) -> bool:
    k = conv.kernel_size[0] if isinstance(conv, nn.Conv2d) else 0
    return (isinstance(conv, nn.Conv2d) and conv.kernel_size == (k, k) and k % 2 == 1 and k >= 5
            and conv.stride == (1, 1) and conv.dilation == (1, 1) and conv.groups == 1
            and conv.padding == (k // 2, k // 2) and conv.out_channels <= 4)


def _polyphase_weights(w: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
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


def _conv_params(m: nn.Conv2d, fixes: dict[int, WeightFix]) -> tuple[np.ndarray, np.ndarray]:
    """A conv's weight and bias as float32 arrays, with its export fix applied."""
    w = m.weight.detach().cpu().numpy().astype(np.float32)
    b = (m.bias.detach().cpu().numpy() if m.bias is not None else np.zeros(w.shape[0])).astype(np.float32)
    return fixes[id(m)](w, b) if id(m) in fixes else (w, b)


def _emit(g: _Graph, m: nn.Module, x: str, fixes: dict[int, WeightFix]) -> str:
    if isinstance(m, nn.Sequential):
        for child in m:
            x = _emit(g, child, x, fixes)
        return x
    if isinstance(m, Residual):
        return g.op("Add", [x, _emit(g, m.body, x, fixes)], "add")
    if isinstance(m, nn.Conv2d):
        w, b = _conv_params(m, fixes)
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
    if isinstance(m, _Polyphase):
        c = m.conv
        w, b = _polyphase_weights(*_conv_params(c, fixes))
        p = c.padding[0]
        mode = "reflect" if c.padding_mode == "reflect" else "constant"
        x = g.op("Pad", [x, g.const("pads", np.array([0, 0, p, p, 0, 0, p, p], np.int64))], "pad", mode=mode)
        x = g.op("SpaceToDepth", [x], "phases", blocksize=2)        # (N, 4 Cin, H/2 + p, W/2 + p)
        return g.op("Conv", [x, g.const("w", w), g.const("b", b)], "conv",
                    kernel_shape=list(w.shape[2:]), pads=[0, 0, 0, 0])  # (N, 4 Cout, H/2, W/2)
    if isinstance(m, nn.InstanceNorm2d):
        return g.op("InstanceNormalization",
                    [x, g.const("in_scale", m.weight.detach().numpy().astype(np.float32)),
                     g.const("in_bias", m.bias.detach().numpy().astype(np.float32))],
                    "inorm", epsilon=float(m.eps))
    if isinstance(m, nn.ReLU):
        return g.op("Relu", [x], "relu")
    if isinstance(m, NearestUp2):
        scales = g.const("scales", np.array([1, 1, 2, 2], np.float32))
        return g.op("Resize", [x, "", scales], "up", mode="nearest",
                    coordinate_transformation_mode="asymmetric", nearest_mode="floor")
    if isinstance(m, nn.PixelShuffle):
        # DCR moves whole channel planes (faster in onnxruntime than torch's CRD order);
        # the conv before it emits its channels in DCR order (_dcr_fix)
        return g.op("DepthToSpace", [x], "shuffle", blocksize=m.upscale_factor, mode="DCR")
    if isinstance(m, nn.PixelUnshuffle):
        # ONNX SpaceToDepth orders channels (block, c); torch orders (c, block): the
        # next conv's input channels are permuted to match (see _first_conv_fix).
        return g.op("SpaceToDepth", [x], "unshuffle", blocksize=m.downscale_factor)
    if isinstance(m, Squash):
        return g.op("Sigmoid", [x], "squash")
    if isinstance(m, FrameFiLM):
        stats = g.op("GlobalAveragePool", [x], "frame_mean")
        t = _emit(g, nn.Sequential(m.squeeze, nn.ReLU()), stats, fixes)
        one_plus = {id(m.gamma): lambda w, b: (w, b + np.float32(1.0))}  # 1 + gamma, in the bias
        scale = _emit(g, m.gamma, t, one_plus)
        return g.op("Add", [g.op("Mul", [x, scale], "film_scale"), _emit(g, m.beta, t, fixes)], "film_shift")
    raise ValueError(f"layer {type(m).__name__} is not supported by the ONNX writer")


def _first_conv_fix(r: int) -> WeightFix:
    """Input is BGR 0..255 (space-to-depth'd in ONNX order); torch wants RGB 0..1."""
    def fix(w: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        k = np.arange(3 * r * r)
        torch_idx = (2 - k % 3) * r * r + k // 3
        return (w[:, torch_idx] / 255.0).astype(np.float32), b
    return fix


def _dcr_fix(r: int) -> WeightFix:
    """Output channels from torch's PixelShuffle order (c r r + i r + j) to ONNX
    DepthToSpace DCR order ((i r + j) C + c)."""
    def fix(w: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        c = w.shape[0] // (r * r)
        n = np.arange(c * r * r)
        old = (n % c) * r * r + n // c
        return w[old], b[old]
    return fix


def _then(first: WeightFix, second: WeightFix) -> WeightFix:
    return lambda w, b: second(*first(w, b))


def _last_conv_fix(r: int) -> WeightFix:
    """Emit BGR instead of RGB, in depth-to-space DCR channel order: output channel
    (i r + j) 3 + c (c in BGR) is torch's channel (2 - c) r r + i r + j."""
    def fix(w: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        n = np.arange(3 * r * r)
        old = (2 - n % 3) * r * r + n // 3
        return w[old], b[old]
    return fix


def _pad_to_multiple(g: _Graph, m: int) -> tuple[str, str | None]:
    """The contract: any frame size in, the same size out. A net that needs sides in
    multiples of m gets `image` (N, H, W, 3) padded at the bottom and right to the next
    multiple (edge pixels repeated); returns (padded, the input's shape for the crop)."""
    if m <= 1:
        return "image", None
    shape = g.op("Shape", ["image"], "in_shape")                      # [N, H, W, 3]
    mult = g.const("multiple", np.array([1, m, m, 1], np.int64))
    pad_end = g.op("Mod", [g.op("Sub", [mult, g.op("Mod", [shape, mult], "rem")], "short"), mult], "pad_end")
    pads = g.op("Concat", [g.const("zeros", np.zeros(4, np.int64)), pad_end], "pads", axis=0)
    return g.op("Pad", ["image", pads], "pad_in", mode="edge"), shape


def _uint8_to_nchw(g: _Graph, r: int, image: str = "image") -> str:
    """uint8 (N, H, W, 3) -> float (N, 3 r r, H / r, W / r), channels in ONNX
    SpaceToDepth order ((i r + j) 3 + c for the pixel (i, j) of each r x r block)."""
    x = g.op("Transpose", [image], "to_nchw", perm=[0, 3, 1, 2])
    if r > 1:
        x = g.op("SpaceToDepth", [x], "unshuffle", blocksize=r)
    return g.op("Cast", [x], "as_float", to=TensorProto.FLOAT)


def _nchw_to_uint8(g: _Graph, x: str, r: int, crop_to: str | None) -> None:
    """uint8 (N, 3 r r, H / r, W / r) in DepthToSpace DCR order ((i r + j) 3 + c) ->
    the output `stylized`, uint8 (N, H, W, 3), cropped back to the input's shape when it
    was padded. DCR moves whole channel planes: faster than CRD in onnxruntime (1.5
    against 2.7 ms for uint8 at 640x360 here)."""
    if r > 1:
        x = g.op("DepthToSpace", [x], "shuffle", blocksize=r, mode="DCR")
    if crop_to is None:
        g.nodes.append(helper.make_node("Transpose", [x], ["stylized"], name="to_nhwc", perm=[0, 2, 3, 1]))
        return
    x = g.op("Transpose", [x], "to_nhwc", perm=[0, 2, 3, 1])
    # crop rows and columns only, so shape inference keeps the 3 channels of the output
    axes = g.const("hw_axes", np.array([1, 2], np.int64))
    hw = g.op("Slice", [crop_to, g.const("one", np.array([1], np.int64)),
                        g.const("three", np.array([3], np.int64))], "in_hw")
    starts = g.const("starts", np.zeros(2, np.int64))
    g.nodes.append(helper.make_node("Slice", [x, starts, hw, axes], ["stylized"], name="crop_back"))


def to_onnx(net: nn.Module, props: dict[str, str], graph_name: str = "limner") -> onnx.ModelProto:
    """Build the contract graph for `net` (a Sequential `net.net` ending in Squash)."""
    seq = net.net
    layers = execution_order(seq)
    convs = [m for m in layers if isinstance(m, nn.Conv2d)]
    if not isinstance(layers[-1], Squash):
        raise ValueError("network must end in Squash")
    down = layers[0].downscale_factor if isinstance(layers[0], nn.PixelUnshuffle) else 1
    up = layers[-2].upscale_factor if isinstance(layers[-2], nn.PixelShuffle) else 1
    fixes: dict[int, WeightFix] = {}

    def add_fix(conv: nn.Module, fix: WeightFix) -> None:
        fixes[id(conv)] = _then(fixes[id(conv)], fix) if id(conv) in fixes else fix

    add_fix(convs[0], _first_conv_fix(down))
    for k, m in enumerate(layers[:-2]):  # inner upsampling; the last shuffle is the output's
        if isinstance(m, nn.PixelShuffle):
            if k == 0 or not isinstance(layers[k - 1], nn.Conv2d):
                raise ValueError("a PixelShuffle must follow a Conv2d for the ONNX writer")
            add_fix(layers[k - 1], _dcr_fix(m.upscale_factor))
    add_fix(convs[-1], _last_conv_fix(up))

    g = _Graph()
    body = list(seq)
    if (down > 1 and not isinstance(body[0], nn.PixelUnshuffle)) or \
            (up > 1 and not isinstance(body[-2], nn.PixelShuffle)):
        raise ValueError("PixelUnshuffle / PixelShuffle must be the first / next-to-last layer of net.net")
    body = body[1 if down > 1 else 0:]          # folded into the input layout change
    if up > 1:
        body = body[:-2] + body[-1:]            # folded into the output layout change
    elif body[-2] is convs[-1] and _polyphase_ok(convs[-1]) and getattr(net, "size_multiple", 1) % 2 == 0:
        body[-2] = _Polyphase(convs[-1])        # its DepthToSpace is the output's (on uint8)
        up = 2
    image, in_shape = _pad_to_multiple(g, int(getattr(net, "size_multiple", 1)))
    x = _uint8_to_nchw(g, down, image)
    x = _emit(g, nn.Sequential(*body), x, fixes)
    x = g.op("Mul", [x, g.const("k255", np.array(255.0, np.float32))], "scale")
    x = g.op("Add", [x, g.const("half", np.array(0.5, np.float32))], "round")
    x = g.op("Cast", [x], "as_uint8", to=TensorProto.UINT8)
    _nchw_to_uint8(g, x, up, in_shape)

    shape = ["batch", "height", "width", 3]
    graph = helper.make_graph(
        g.nodes, graph_name,
        [helper.make_tensor_value_info("image", TensorProto.UINT8, shape)],
        [helper.make_tensor_value_info("stylized", TensorProto.UINT8, shape)],
        initializer=g.inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)],
                              producer_name="limner")
    model.ir_version = IR_VERSION
    for k, v in props.items():
        model.metadata_props.add(key=k, value=v)
    onnx.checker.check_model(model)
    return model
