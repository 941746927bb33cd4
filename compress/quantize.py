"""int8: onnxruntime static quantization, QDQ format, per-channel weights.

Integer types follow ONNX Runtime's own guidance, chosen from the CPU at run time:
U8S8 (uint8 activations, int8 weights) with reduce_range off on x86 with VNNI, with
reduce_range on for x86 without VNNI, and S8S8 on ARM. quant_pre_process runs
first; calibration uses the calibration split (MinMax, Entropy or Percentile); a
sensitivity pass leaves the convolutions whose int8 costs most quality in fp32, while
at least `min_int8_mac_share` of the conv MACs stay int8.
"""
from __future__ import annotations

import json
import tempfile
from pathlib import Path

import numpy as np
import onnx
from onnx import shape_inference
from onnxruntime.quantization import quant_pre_process

from limner.bench.int8 import TYPES, IntTypes, count_qdq, detect_types, quantize_qdq
from limner.bench.metrics import ms_ssim
from limner.runtime.metadata import PREFIX
from limner.runtime.session import make_session

from .export import save_onnx
from .recipe import Int8Spec

def onnx_conv_macs(model: onnx.ModelProto, height: int, width: int) -> dict[str, int]:
    """Conv node name -> MACs at a fixed input size (shape inference on a pinned copy)."""
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
             spec: Int8Spec, props: dict[str, str], calib_hashes: list[str], log=print) -> dict:
    """Quantize one fp32 model; returns what it did (types, excluded layers, MAC share, agreement)."""
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
    save_onnx(model, out_path)
    log(f"  int8 {out_path.name}: {types.label}, {counts['int8_convs']}/{counts['convs']} convs int8, "
        f"{share:.0%} of conv MACs, fp32 kept: {exclude or 'none'}, MS-SSIM to fp32 {agreement:.4f}")
    return info | {"sensitivity": {n: g for g, n in gains}}


def with_props(props: dict[str, str], **changes: str) -> dict[str, str]:
    out = dict(props)
    out.update({PREFIX + k: v for k, v in changes.items()})
    return out
