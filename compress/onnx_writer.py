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
(the teacher's 9x9 conv to RGB) is written in its exact 2x2 polyphase form (`layer_table.Polyphase`):
the bundled teacher ran 1,277 -> 1,155 ms per 640x360 frame here.
"""
from __future__ import annotations

import numpy as np
import onnx
from onnx import TensorProto, helper
from torch import nn

from .layer_table import (
    Graph,
    Polyphase,
    WeightFix,
    emit,
    execution_order,
    polyphase_ok,
)
from .layers import Squash

OPSET = 17
IR_VERSION = 8  # the IR that goes with opset 17; loads on onnxruntime >= 1.14


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


def _pad_to_multiple(g: Graph, m: int) -> tuple[str, str | None]:
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


def _uint8_to_nchw(g: Graph, r: int, image: str = "image") -> str:
    """uint8 (N, H, W, 3) -> float (N, 3 r r, H / r, W / r), channels in ONNX
    SpaceToDepth order ((i r + j) 3 + c for the pixel (i, j) of each r x r block)."""
    x = g.op("Transpose", [image], "to_nchw", perm=[0, 3, 1, 2])
    if r > 1:
        x = g.op("SpaceToDepth", [x], "unshuffle", blocksize=r)
    return g.op("Cast", [x], "as_float", to=TensorProto.FLOAT)


def _planes_to_output(g: Graph, x: str, r: int, crop_to: str | None) -> None:
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

    g = Graph()
    body = list(seq)
    if (down > 1 and not isinstance(body[0], nn.PixelUnshuffle)) or \
            (up > 1 and not isinstance(body[-2], nn.PixelShuffle)):
        raise ValueError("PixelUnshuffle / PixelShuffle must be the first / next-to-last layer of net.net")
    body = body[1 if down > 1 else 0:]          # folded into the input layout change
    if up > 1:
        body = body[:-2] + body[-1:]            # folded into the output layout change
    elif body[-2] is convs[-1] and polyphase_ok(convs[-1]) and getattr(net, "size_multiple", 1) % 2 == 0:
        body[-2] = Polyphase(convs[-1])        # its DepthToSpace is the output's (on uint8)
        up = 2
    image, in_shape = _pad_to_multiple(g, int(getattr(net, "size_multiple", 1)))
    x = _uint8_to_nchw(g, down, image)
    x = emit(g, nn.Sequential(*body), x, fixes)
    x = g.op("Mul", [x, g.const("k255", np.array(255.0, np.float32))], "scale")
    x = g.op("Add", [x, g.const("half", np.array(0.5, np.float32))], "round")
    x = g.op("Cast", [x], "as_uint8", to=TensorProto.UINT8)
    _planes_to_output(g, x, up, in_shape)

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
