"""`limner capture`: frames land only in the folder given, numbered on from earlier runs."""
from __future__ import annotations

import subprocess

import cv2

from conftest import PY


def test_capture_writes_numbered_frames(tmp_path):
    out = tmp_path / "venue"
    for _ in range(2):
        r = subprocess.run([PY, "-m", "limner.runtime.cli", "capture", "--source", "demo", "--frames", "3",
                            "--every", "2", "-o", str(out)], capture_output=True, text=True, timeout=120)
        assert r.returncode == 0, r.stderr
    names = sorted(p.name for p in out.iterdir())
    assert names == [f"frame_{i:06d}.jpg" for i in range(1, 7)]
    img = cv2.imread(str(out / names[0]))
    assert img is not None and img.shape == (360, 640, 3)
    assert [p for p in tmp_path.iterdir()] == [out]  # nothing written elsewhere


def test_capture_rejects_bad_counts(tmp_path):
    r = subprocess.run([PY, "-m", "limner.runtime.cli", "capture", "--source", "demo", "--frames", "0",
                        "-o", str(tmp_path / "x")], capture_output=True, text=True, timeout=120)
    assert r.returncode == 1 and "--frames 0" in r.stderr
