"""The runtime on 64-bit ARM's software stack (tools/arm_check.py, `make arm-check`).

Runs the check when the emulated arm64 root exists and this is root (chroot); otherwise it
reads the report a previous `make arm-check` left in out/arm-check/, and skips saying why
when there is neither.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "tools"))
import arm_check  # noqa: E402

from limner.bench.platform_outputs import FP32_TOLERANCE, bundled_models  # noqa: E402

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def report() -> dict:
    path = arm_check.OUT / "report.json"
    if (arm_check.ROOT / arm_check.READY).exists() and os.geteuid() == 0 and not arm_check.tools_missing():
        subprocess.run([sys.executable, str(REPO / "tools" / "arm_check.py")], cwd=REPO, timeout=3600)
    if not path.exists():
        pytest.skip(f"no arm64 root at {arm_check.ROOT} and no {path}: run `make arm-check` "
                    "(root, qemu-user-static; builds the root once)")
    return json.loads(path.read_text())


def test_every_bundled_model_matches_x86(report):
    names = {d["model"] for d in report["models"]}
    assert names == {p.name for p in bundled_models()}
    for d in report["models"]:
        # fp32: 3 units of 255 (summation order and FMA only; common practice, no source).
        if d["precision"] == "fp32":
            assert d["tolerance"] == FP32_TOLERANCE
        # int8: no more than the model's own quantization error on the same frame.
        assert d["max_abs"] <= d["tolerance"], d


def test_int8_types_are_the_ones_advised_for_arm(report):
    # ONNX Runtime's quantization documentation advises S8S8 in QDQ format on ARM64 (from
    # memory of its "quantize ONNX models" guide and the quantize_static docstring).
    assert report["facts"]["machine"] == "aarch64"
    assert report["facts"]["int8_types"] == "s8s8"


def test_excluded_onnxruntime_stays_excluded(report):
    assert report["facts"]["onnxruntime"] != "1.21.0"
    assert any("!=1.21.0" in r for r in report["facts"]["requires"])


def test_board_install_is_torch_free_and_runs_live(report):
    assert not report["facts"]["torch_importable"]
    assert report["steps"]["import"]["ok"]
    assert report["steps"]["live"]["frames_written"] == arm_check.LIVE_FRAMES
    assert report["steps"]["live"]["peak_rss_mib"] > 0
