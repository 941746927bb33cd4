"""The runtime rejects bad model files with one line naming the file and the problem."""
from __future__ import annotations

import subprocess

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper

from limner.runtime.model import ModelError, load_model

from conftest import PY


def _foreign_onnx(path, elem=TensorProto.UINT8, props=None):
    """A valid ONNX file that is not a Limner model (an Identity graph)."""
    g = helper.make_graph([helper.make_node("Identity", ["x"], ["y"])], "g",
                          [helper.make_tensor_value_info("x", elem, ["n", "h", "w", 3])],
                          [helper.make_tensor_value_info("y", elem, ["n", "h", "w", 3])])
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    m.ir_version = 8
    for k, v in (props or {}).items():
        m.metadata_props.add(key=k, value=v)
    onnx.save(m, str(path))
    return path


def _props(teacher_onnx, **changes):
    m = onnx.load(str(teacher_onnx))
    p = {x.key: x.value for x in m.metadata_props}
    p.update({f"limner.{k}": v for k, v in changes.items()})
    return p


def test_good_model_loads(teacher_onnx):
    m = load_model(teacher_onnx, threads=1)
    assert m.meta.role == "teacher" and m.size_multiple == 4
    y = m.run(np.zeros((32, 48, 3), np.uint8))
    assert y.shape == (32, 48, 3) and y.dtype == np.uint8


@pytest.mark.parametrize("case,pattern", [
    ("missing", "no such model file"),
    ("empty", "file is empty"),
    ("png", "cannot be loaded as an ONNX model"),
    ("truncated", "cannot be loaded as an ONNX model"),
    ("foreign", "not a Limner model"),
    ("float_io", "expected tensor\\(uint8\\)"),
    ("newer", "format 99 is newer"),
    ("bad_role", "limner.role"),
])
def test_bad_models_are_rejected_with_one_clear_line(case, pattern, tmp_path, teacher_onnx):
    path = tmp_path / f"{case}.onnx"
    if case == "empty":
        path.write_bytes(b"")
    elif case == "png":
        path.write_bytes(b"\x89PNG\r\n\x1a\n" + bytes(200))
    elif case == "truncated":
        data = teacher_onnx.read_bytes()
        path.write_bytes(data[: len(data) // 2])
    elif case == "foreign":
        _foreign_onnx(path)
    elif case == "float_io":
        _foreign_onnx(path, TensorProto.FLOAT, _props(teacher_onnx))
    elif case == "newer":
        _foreign_onnx(path, props=_props(teacher_onnx, format="99"))
    elif case == "bad_role":
        _foreign_onnx(path, props=_props(teacher_onnx, role="oracle"))
    with pytest.raises(ModelError, match=pattern) as e:
        load_model(path, threads=1)
    msg = str(e.value)
    assert str(path) in msg and "\n" not in msg
    # the CLI prints that one line and exits non-zero, without a traceback
    r = subprocess.run([PY, "-m", "limner.runtime.cli", "live", "--model", str(path), "--headless",
                        "--frames", "1"], capture_output=True, text=True, timeout=120)
    assert r.returncode != 0
    assert "Traceback" not in r.stderr
    lines = [l for l in r.stderr.splitlines() if l.strip()]
    assert len(lines) == 1 and str(path) in lines[0], r.stderr


def test_too_small_a_frame_is_refused_by_size(teacher_onnx):
    import numpy as np

    from limner.runtime.model import MIN_SIDE, ModelError, load_model

    m = load_model(teacher_onnx, threads=1)
    with pytest.raises(ModelError, match=f"a 40x{MIN_SIDE - 1} frame is too small"):
        m.run(np.zeros((MIN_SIDE - 1, 40, 3), np.uint8))
    assert m.run(np.zeros((MIN_SIDE, 17, 3), np.uint8)).shape == (MIN_SIDE, 17, 3)
