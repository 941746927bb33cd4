"""int8 facts that need no torch: which integer types suit this CPU, and what a
quantized model file really holds."""
from __future__ import annotations

import platform
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from .machine import cpu_features

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
    from onnxruntime.quantization import (CalibrationDataReader, CalibrationMethod, QuantFormat,
                                          quantize_static)

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
