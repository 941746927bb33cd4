"""Does int8 pay on this CPU? A chain of conv + ReLU layers, fp32 and QDQ int8 (quantized
by the same function and with the types `limner compress` would use here), timed
interleaved in one process.

The ratio bounds what any int8 candidate can gain here: a whole model also has layers
that stay in float and quantize/dequantize steps, so it rarely beats its convs alone.
Run it on the device that will run the show before spending calibration time on int8
candidates. Torch-free, like the bench; needs the onnx package (loaded only when run).
"""
from __future__ import annotations

import os
import statistics
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import onnxruntime as ort
from limner.runtime.errors import InputError
from limner.runtime.session import make_session, session_options

from .int8 import TYPES, count_qdq, detect_types, quantize_qdq

PAYS_AT = 1.15  # int8 / fp32 speed an int8 candidate should reach to be worth its quality cost


@dataclass(frozen=True)
class ProbeSpec:
    channels: int = 64
    kernel: int = 3
    height: int = 180       # 640x360 at half resolution, where the students' bodies run
    width: int = 320
    layers: int = 4
    threads: int = 0        # 0: one per core
    rounds: int = 5         # interleaved fp32 / int8 rounds
    runs: int = 5           # timed runs per model per round
    types: str = "auto"

    def __post_init__(self) -> None:
        for name in ("channels", "kernel", "height", "width", "layers", "rounds", "runs"):
            if getattr(self, name) < 1:
                raise InputError(f"{name}={getattr(self, name)}: must be >= 1")
        if self.kernel % 2 == 0:
            raise InputError(f"kernel={self.kernel}: must be odd (same padding)")
        if self.threads < 0:
            raise InputError(f"threads={self.threads}: must be >= 0")
        if self.types != "auto" and self.types not in TYPES:
            raise InputError(f"types={self.types!r}: one of auto, {', '.join(TYPES)}")

    @property
    def macs(self) -> int:
        return self.layers * self.channels ** 2 * self.kernel ** 2 * self.height * self.width


@dataclass(frozen=True)
class ProbeResult:
    spec: ProbeSpec
    types: str
    fp32_ms: float          # median over rounds of each round's median
    int8_ms: float
    int8_convs: int         # convs between DequantizeLinear nodes in the quantized file
    fused_int8_convs: int   # QLinearConv nodes in onnxruntime's optimized graph: run as int8
    rel_rms_error: float    # RMS(int8 - fp32) / RMS(fp32), on the probe's input

    @property
    def ratio(self) -> float:
        """fp32 time / int8 time: above 1 means int8 is faster."""
        return self.fp32_ms / self.int8_ms

    def verdict(self) -> str | None:
        """A warning when int8 convs are not clearly faster here (the issue's bar for an int8
        candidate, 1.15x), else None."""
        if self.ratio >= PAYS_AT:
            return None
        return ("int8 convolutions are not clearly faster than fp32 on this CPU: int8 candidates "
                "will likely run no faster than their fp32 parents here")

    def summary(self) -> str:
        s = self.spec
        return (f"int8 probe: {s.layers} x conv {s.kernel}x{s.kernel} {s.channels}->{s.channels} at "
                f"{s.width}x{s.height} ({s.macs / 1e9:.2f} GMACs), {self.types}: fp32 "
                f"{self.fp32_ms:.1f} ms, int8 {self.int8_ms:.1f} ms, int8 runs {self.ratio:.2f}x fp32")


def conv_chain(spec: ProbeSpec, seed: int = 0):
    """`layers` x (Conv k x k, same padding, bias; Relu) on a float (1, C, H, W) input:
    an onnx.ModelProto."""
    from onnx import TensorProto, helper, numpy_helper

    rng = np.random.default_rng(seed)
    c, k = spec.channels, spec.kernel
    nodes, inits = [], []
    x = "x"
    for i in range(spec.layers):
        w = rng.normal(0, np.sqrt(2 / (c * k * k)), (c, c, k, k)).astype(np.float32)  # He init
        b = rng.normal(0, 0.01, c).astype(np.float32)
        inits += [numpy_helper.from_array(w, f"w{i}"), numpy_helper.from_array(b, f"b{i}")]
        nodes += [helper.make_node("Conv", [x, f"w{i}", f"b{i}"], [f"c{i}"], name=f"conv{i}",
                                   pads=[k // 2] * 4),
                  helper.make_node("Relu", [f"c{i}"], [f"r{i}"], name=f"relu{i}")]
        x = f"r{i}"
    shape = [1, c, spec.height, spec.width]
    graph = helper.make_graph(nodes, "int8_probe",
                              [helper.make_tensor_value_info("x", TensorProto.FLOAT, shape)],
                              [helper.make_tensor_value_info(x, TensorProto.FLOAT, shape)], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])


def _median_ms(session: ort.InferenceSession, x: np.ndarray, runs: int) -> float:
    times = []
    for _ in range(runs):
        t0 = time.perf_counter()
        session.run(None, {"x": x})
        times.append(time.perf_counter() - t0)
    return 1000 * statistics.median(times)


def probe(spec: ProbeSpec = ProbeSpec(),
          progress: Callable[[int, int], None] | None = None) -> ProbeResult:
    import onnx
    from onnxruntime.quantization import quant_pre_process

    label = detect_types() if spec.types == "auto" else spec.types
    types = TYPES[label]
    rng = np.random.default_rng(1)
    shape = (1, spec.channels, spec.height, spec.width)
    # post-ReLU-like inputs: non-negative, as a conv inside a network sees
    calib = [np.abs(rng.normal(0, 1, shape)).astype(np.float32) for _ in range(2)]
    x = calib[0]  # calibrated on the timed input: no clipping in the agreement figure
    with tempfile.TemporaryDirectory() as tmp:
        fp32, pre, q = (Path(tmp) / n for n in ("fp32.onnx", "pre.onnx", "int8.onnx"))
        onnx.save(conv_chain(spec), str(fp32))
        # the probe's shapes are fixed, so ONNX's own shape inference suffices; the symbolic
        # one needs sympy, which onnxruntime no longer installs (a board's core install lacks it)
        quant_pre_process(str(fp32), str(pre), skip_symbolic_shape=True)
        quantize_qdq(pre, q, [{"x": c} for c in calib], types)
        counts = count_qdq(onnx.load(str(q)))
        threads = spec.threads or os.cpu_count() or 1
        sf = make_session(str(fp32), threads)
        so = session_options(threads)
        so.optimized_model_filepath = str(Path(tmp) / "optimized.onnx")
        sq = ort.InferenceSession(str(q), sess_options=so, providers=["CPUExecutionProvider"])
        fused = sum(n.op_type == "QLinearConv" for n in onnx.load(so.optimized_model_filepath).graph.node)
    yf, yq = sf.run(None, {"x": x})[0], sq.run(None, {"x": x})[0]  # also warm-up
    tf, tq = [], []
    for r in range(spec.rounds):
        tf.append(_median_ms(sf, x, spec.runs))
        tq.append(_median_ms(sq, x, spec.runs))
        if progress:
            progress(r + 1, spec.rounds)
    return ProbeResult(spec, label, statistics.median(tf), statistics.median(tq),
                       counts["int8_convs"], fused, float(np.sqrt(np.mean((yq - yf) ** 2) / np.mean(yf ** 2))))
