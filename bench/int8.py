"""The int8 recipe, all of it (torch-free: compress and int8-probe share it): the recipe's
[int8] table (Int8Spec), the integer types for this CPU, the one static quantization
Limner makes, the sensitivity pass that keeps the costliest convolutions in fp32, and what
a quantized file really holds.

onnxruntime static quantization, QDQ format, per-channel weights. Integer types follow ONNX
Runtime's own guidance, chosen from the CPU at run time: U8S8 (uint8 activations, int8
weights) with reduce_range off on x86 with VNNI, with reduce_range on for x86 without VNNI,
and S8S8 on ARM. quant_pre_process runs first; calibration uses the calibration split
(MinMax, Entropy or Percentile); a sensitivity pass leaves the convolutions whose int8
costs most quality in fp32, while at least `min_int8_mac_share` of the conv MACs stay int8.
onnx and onnxruntime.quantization load only when used (a board runs shows without onnx).
"""
from __future__ import annotations

import json
import logging
import platform
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Callable

import numpy as np
from limner.runtime.errors import InputError
from limner.runtime.metadata import PREFIX
from limner.runtime.outputs import atomic_write_bytes
from limner.runtime.session import make_session

from .machine import cpu_features
from .metrics import ms_ssim

if TYPE_CHECKING:  # onnx (and onnxruntime.quantization, which needs it) load only when used
    import onnx
    from onnxruntime.quantization import QuantType


@dataclass(frozen=True)
class IntTypes:
    label: str
    signed_activation: bool
    reduce_range: bool

    @property
    def activation(self) -> QuantType:
        from onnxruntime.quantization import QuantType
        return QuantType.QInt8 if self.signed_activation else QuantType.QUInt8

    @property
    def weight(self) -> QuantType:
        from onnxruntime.quantization import QuantType
        return QuantType.QInt8


TYPES = {"u8s8": IntTypes("u8s8", False, False),
         "u8s8-reduced": IntTypes("u8s8-reduced", False, True),
         "s8s8": IntTypes("s8s8", True, False)}


def detect_types() -> str:
    """ONNX Runtime's own guidance (its quantize_static docstring): U8S8 with reduce_range
    off on x86 with VNNI, on without VNNI; S8S8 on ARM."""
    arch = platform.machine().lower()
    if arch in ("aarch64", "arm64") or arch.startswith("arm"):
        return "s8s8"
    feats = set(cpu_features())
    return "u8s8" if feats & {"avx512_vnni", "avx_vnni"} else "u8s8-reduced"


def count_qdq(model: onnx.ModelProto) -> dict[str, int]:
    """How many Convs run between DequantizeLinear nodes, and int8 weight initializers
    (the checks ONNX Runtime's own quantization tests make)."""
    import onnx

    produced_by = {o: n for n in model.graph.node for o in n.output}
    int8_inits = {i.name for i in model.graph.initializer
                  if i.data_type in (onnx.TensorProto.INT8, onnx.TensorProto.UINT8)}
    q_convs = 0
    convs = 0
    for n in model.graph.node:
        if n.op_type != "Conv":
            continue
        convs += 1
        x, w = (produced_by.get(n.input[0]), produced_by.get(n.input[1]))
        if x is not None and w is not None and x.op_type == "DequantizeLinear" and \
                w.op_type == "DequantizeLinear" and w.input[0] in int8_inits:
            q_convs += 1
    return {"convs": convs, "int8_convs": q_convs,
            "quantize_nodes": sum(n.op_type == "QuantizeLinear" for n in model.graph.node),
            "dequantize_nodes": sum(n.op_type == "DequantizeLinear" for n in model.graph.node),
            "int8_initializers": len(int8_inits)}


CALIBRATIONS = ("minmax", "entropy", "percentile")

# Ops that run in int8 between QuantizeLinear / DequantizeLinear (the rest stays float).
QDQ_OPS = ("Conv", "Relu", "Add", "Resize", "DepthToSpace", "SpaceToDepth")


def quantize_qdq(src: Path, out: Path, batches: list[dict[str, np.ndarray]], types: IntTypes,
                 calibration: str = "minmax", exclude: Sequence[str] = (),
                 cache: Path | None = None) -> None:
    """The one static quantization Limner makes (compress and int8-probe alike): QDQ
    format, per-channel weights, `types`, calibrated on `batches` (input name -> array)
    with MinMax, Entropy or Percentile; nodes in `exclude` stay in float."""
    from onnxruntime.quantization import (
        CalibrationDataReader,
        CalibrationMethod,
        QuantFormat,
        quantize_static,
    )

    class Batches(CalibrationDataReader):
        def __init__(self) -> None:
            self.i = 0

        def get_next(self) -> dict | None:
            if self.i >= len(batches):
                return None
            self.i += 1
            return batches[self.i - 1]

        def rewind(self) -> None:
            self.i = 0

    method = {"minmax": CalibrationMethod.MinMax, "entropy": CalibrationMethod.Entropy,
              "percentile": CalibrationMethod.Percentile}[calibration]  # keys: CALIBRATIONS
    quantize_static(str(src), str(out), Batches(), quant_format=QuantFormat.QDQ,
                    op_types_to_quantize=list(QDQ_OPS), per_channel=True,
                    reduce_range=types.reduce_range, activation_type=types.activation,
                    weight_type=types.weight, nodes_to_exclude=list(exclude),
                    calibrate_method=method, calibration_cache_path=str(cache) if cache else None)


@dataclass
class Int8Spec:
    enabled: bool = True
    models: list[str] = field(default_factory=list)   # empty: every fp32 candidate
    calibration: str = "minmax"
    types: str = "auto"            # auto: from the CPU (U8S8 on x86, S8S8 on ARM)
    calibration_frames: int = 32
    calibration_size: int = 256
    min_int8_mac_share: float = 0.8
    max_fp32_layers: int = 3       # sensitivity pass leaves at most this many convs in fp32
    min_gain: float = 0.002        # ... and only those whose fp32 restores at least this MS-SSIM

    def __post_init__(self) -> None:
        if self.calibration not in CALIBRATIONS:
            raise InputError(f"int8.calibration={self.calibration!r}: one of {', '.join(CALIBRATIONS)}")
        if self.types != "auto" and self.types not in TYPES:
            raise InputError(f"int8.types={self.types!r}: auto or one of {', '.join(TYPES)}")
        if not 0 <= self.min_int8_mac_share <= 1:
            raise InputError(f"int8.min_int8_mac_share={self.min_int8_mac_share}: between 0 and 1")


def onnx_conv_macs(model: onnx.ModelProto, height: int, width: int) -> dict[str, int]:
    """Conv node name -> MACs at a fixed input size (shape inference on a pinned copy)."""
    import onnx
    from onnx import shape_inference

    m = onnx.ModelProto()
    m.CopyFrom(model)
    dims = m.graph.input[0].type.tensor_type.shape.dim
    for d, v in zip(dims, (1, height, width, 3)):
        d.Clear()
        d.dim_value = v
    m = shape_inference.infer_shapes(m)
    shapes = {vi.name: [d.dim_value for d in vi.type.tensor_type.shape.dim]
              for vi in list(m.graph.value_info) + list(m.graph.output)}
    inits = {i.name: i for i in m.graph.initializer}
    out = {}
    for n in m.graph.node:
        if n.op_type != "Conv":
            continue
        w = inits.get(n.input[1])
        if w is None:  # QDQ: weight comes through DequantizeLinear
            continue
        co, ci, kh, kw = list(w.dims)
        oh, ow = shapes[n.output[0]][2:4]
        out[n.name] = oh * ow * co * ci * kh * kw
    return out


def output_tail(model: onnx.ModelProto) -> list[str]:
    """The nodes after the last Conv (Sigmoid, scaling, Cast, layout): they stay in float
    and uint8 as written; quantizing them would add a rounding step to the output and a
    quantize / dequantize pair at full resolution."""
    nodes = model.graph.node  # topologically sorted (ONNX requires it)
    last = max((i for i, n in enumerate(nodes) if n.op_type == "Conv"), default=len(nodes) - 1)
    return [n.name for n in nodes[last + 1:]]


def _quantize(pre: Path, out: Path, frames: list[np.ndarray], spec: Int8Spec, types: IntTypes,
              exclude: list[str], cache: Path) -> None:
    quantize_qdq(pre, out, [{"image": f[None]} for f in frames], types, spec.calibration, exclude, cache)


def _agreement(a_model: str | bytes, b_model: str | bytes, frames: list[np.ndarray]) -> float:
    sa, sb = make_session(a_model, 2), make_session(b_model, 2)
    vals = [ms_ssim(sa.run(None, {"image": f[None]})[0][0], sb.run(None, {"image": f[None]})[0][0])
            for f in frames]
    return float(np.mean(vals))


def quantize(fp32_path: Path, out_path: Path, calib: list[np.ndarray], check: list[np.ndarray],
             spec: Int8Spec, props: dict[str, str], calib_hashes: list[str],
             log: Callable[[str], None] = print) -> dict:
    """Quantize one fp32 model; returns what it did (types, excluded layers, MAC share, agreement)."""
    import onnx
    from onnxruntime.quantization import quant_pre_process

    # its symbolic shape inference warns about the in-graph padding's dimensions ("Unable to
    # determine if width <= ...") on every model: true of our graphs, and no use to the user
    logging.getLogger("onnxruntime.tools.symbolic_shape_infer").setLevel(logging.ERROR)
    types = TYPES[detect_types() if spec.types == "auto" else spec.types]
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        pre = tmp / "pre.onnx"
        quant_pre_process(str(fp32_path), str(pre))
        pre_model = onnx.load(str(pre))
        h, w = check[0].shape[:2]
        macs = onnx_conv_macs(pre_model, h, w)
        total = sum(macs.values())
        cache = tmp / "calib"
        full = tmp / "full.onnx"
        tail = output_tail(pre_model)  # never quantized
        _quantize(pre, full, calib, spec, types, tail, cache)
        base = _agreement(str(fp32_path), str(full), check)
        gains: list[tuple[float, str]] = []
        for node in macs:
            trial = tmp / "trial.onnx"
            _quantize(pre, trial, calib, spec, types, tail + [node], cache)
            gains.append((_agreement(str(fp32_path), str(trial), check) - base, node))
        gains.sort(reverse=True)
        exclude: list[str] = []
        for gain, node in gains:
            if len(exclude) >= spec.max_fp32_layers or gain < spec.min_gain:
                break
            share = 1 - sum(macs[n] for n in exclude + [node]) / total
            if share >= spec.min_int8_mac_share:
                exclude.append(node)
        final = tmp / "final.onnx"
        _quantize(pre, final, calib, spec, types, tail + exclude, cache)
        model = onnx.load(str(final))
    # the pre-processing's shape inference renames the contract's dimensions (after the
    # in-graph padding it cannot tell the output has 3 channels): declare them as the fp32 file does
    src = onnx.load(str(fp32_path))
    for got, ref in ((model.graph.input, src.graph.input), (model.graph.output, src.graph.output)):
        for g_, r_ in zip(got, ref):
            g_.type.CopyFrom(r_.type)
    agreement = _agreement(str(fp32_path), model.SerializeToString(), check)
    counts = count_qdq(model)
    share = 1 - sum(macs[n] for n in exclude) / total
    info = {"types": types.label, "reduce_range": types.reduce_range, "method": spec.calibration,
            "per_channel": True, "format": "QDQ", "frames": len(calib),
            "frame_size": list(calib[0].shape[:2]), "excluded_fp32": exclude,
            "int8_mac_share": share, "ms_ssim_to_fp32": agreement, "ms_ssim_all_int8": base,
            **counts, "data_sha256": calib_hashes}
    props = dict(props)
    props[PREFIX + "calibration"] = json.dumps(info, sort_keys=True)  # how it was calibrated
    del model.metadata_props[:]
    for k, v in props.items():
        model.metadata_props.add(key=k, value=v)
    data = model.SerializeToString()
    atomic_write_bytes(out_path, lambda f: f.write(data))
    log(f"  int8 {out_path.name}: {types.label}, {counts['int8_convs']}/{counts['convs']} convs int8, "
        f"{share:.0%} of conv MACs, fp32 kept: {exclude or 'none'}, MS-SSIM to fp32 {agreement:.4f}")
    return info | {"sensitivity": {n: g for g, n in gains}}


def with_props(props: dict[str, str], **changes: str) -> dict[str, str]:
    out = dict(props)
    out.update({PREFIX + k: v for k, v in changes.items()})
    return out
