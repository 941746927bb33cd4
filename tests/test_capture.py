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


def test_capture_from_an_unreadable_source_leaves_nothing_and_no_ffmpeg_noise(tmp_path):
    """An empty .mp4 (FFmpeg prints 'moov atom not found' on its own) and a camera that does
    not exist: one Limner line, exit 1, no folder left behind."""
    empty = tmp_path / "empty.mp4"
    empty.write_bytes(b"")
    for source in (str(empty), "/dev/video97"):
        out = tmp_path / "never"
        r = subprocess.run([PY, "-m", "limner.runtime.cli", "capture", "--source", source, "--frames", "3",
                            "-o", str(out)], capture_output=True, text=True, timeout=120)
        assert r.returncode == 1, r.stderr
        lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
        assert len(lines) == 1 and lines[0].startswith("limner capture: error:"), r.stderr
        assert not out.exists()
