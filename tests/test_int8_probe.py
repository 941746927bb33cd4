"""`limner int8-probe`: the fp32 and int8 conv chains it times compute the same thing,
the int8 one really runs its convs in int8, and its MAC count is the hand arithmetic."""
from __future__ import annotations

import numpy as np
import onnx
import pytest

from limner.bench.int8 import count_qdq
from limner.bench.int8_probe import ProbeSpec, conv_chain, probe
from limner.runtime.cli import main
from limner.runtime.session import make_session

TINY = ProbeSpec(channels=8, kernel=3, height=24, width=40, layers=2, rounds=1, runs=1)


def test_probe_int8_is_int8_and_agrees_with_fp32():
    r = probe(TINY)
    # every conv runs between DequantizeLinear nodes with int8 weights, counted as ONNX
    # Runtime's own quantization tests count them
    assert r.int8_convs == TINY.layers
    # and onnxruntime really runs them as int8 kernels: its optimized graph holds one
    # QLinearConv per conv (the QDQ fusion of ONNX Runtime's quantization docs)
    assert r.fused_int8_convs == TINY.layers
    assert r.fp32_ms > 0 and r.int8_ms > 0 and r.ratio == pytest.approx(r.fp32_ms / r.int8_ms)
    # onnxruntime's fp32 run as reference: int8 through two layers differs by a few percent
    # RMS, not more (8-bit steps are 1/255 of a calibrated range, 7-bit weights with
    # reduce_range; common practice, no source), and not zero (it really is quantized)
    assert 0 < r.rel_rms_error < 0.05
    assert r.types in ("u8s8", "u8s8-reduced", "s8s8")


def test_conv_chain_is_what_it_says():
    m = conv_chain(TINY)
    onnx.checker.check_model(m)
    assert [n.op_type for n in m.graph.node] == ["Conv", "Relu"] * 2
    x = np.random.default_rng(0).normal(0, 1, (1, 8, 24, 40)).astype(np.float32)
    y = make_session(m.SerializeToString(), 1).run(None, {"x": x})[0]
    assert y.shape == x.shape and y.min() >= 0  # same padding; ends in ReLU
    # MACs: layers x C_out x C_in x k x k x H x W (hand arithmetic: 2*8*8*9*24*40)
    assert TINY.macs == 1_105_920
    assert count_qdq(m)["int8_convs"] == 0


@pytest.mark.parametrize("change, word", [({"kernel": 4}, "kernel=4"), ({"channels": 0}, "channels=0"),
                                          ({"types": "u4"}, "types='u4'"), ({"threads": -1}, "threads=-1")])
def test_probe_spec_names_the_bad_value(change, word):
    with pytest.raises(ValueError, match=word):
        ProbeSpec(**change)


def test_cli_prints_the_ratio(capsys):
    assert main(["int8-probe", "--channels", "8", "--resolution", "40x24", "--layers", "1"]) == 0
    out = capsys.readouterr().out
    assert "int8 runs" in out and "1/1 convs run as int8 kernels" in out
