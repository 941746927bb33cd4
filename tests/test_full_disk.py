"""A full disk, simulated with a file size limit (RLIMIT_FSIZE, POSIX setrlimit: a write past
the limit fails with EFBIG, as one on a full disk fails with ENOSPC): every subcommand that
writes must end with one line naming the file, exit 1, no traceback, no temp or
half-written file, and keep what it had written before.

Found before the fixes here: capture raised an OSError traceback; live reported "wrote
out.mp4" for a recording cut off at the limit (OpenCV's writer reports no errors); train's
checkpoint failed inside torch's zip writer with a RuntimeError traceback; bench printed
libpng's "Write Error", left report.json and report.csv without report.md, and named no file.
"""
from __future__ import annotations

import resource
import signal
import subprocess
from pathlib import Path

import pytest
from conftest import PY, REPO
from test_compress import PHOTOS, TINY_RECIPE
from test_interrupts import CLIP, DEFAULT, PHOTO, TEACHER, TINY_TRAIN, TRAIN, _complete


def _argv(name: str, d: Path, teacher_onnx: Path) -> list[str]:
    return {
        "bench": ["bench", str(DEFAULT), "--teacher", str(TEACHER), "--content", str(PHOTO),
                  "--resolutions", "160x96", "--frames", "3", "-o", str(d / "out")],
        "capture": ["capture", "--source", str(CLIP), "--frames", "40", "-o", str(d / "out")],
        "live": ["live", "--source", str(CLIP), "--headless", "--frames", "200",
                 "--output", str(d / "show.mp4")],
        "train": ["train", "ember", "--content", str(TRAIN), "--config", str(d / "train.toml"),
                  "--loss-net", "random", "-o", str(d / "out")],
        "compress": ["compress", str(teacher_onnx), "--content", *PHOTOS, "scenes:3",
                     "--recipe", str(d / "tiny.toml"), "-o", str(d / "out")],
    }[name]


# a limit each subcommand passes a few files under and then meets (bytes)
LIMIT = {"bench": 30_000, "capture": 60_000, "live": 60_000, "train": 60_000, "compress": 200_000}
# train with more room: its style image fits, its first checkpoint does not
LIMIT_CHECKPOINT = 1_000_000
NAMES = {"bench": "out", "capture": "frame_000003.jpg", "live": "show.mp4", "train": "style.png",
         "compress": "cache.npz"}


@pytest.mark.parametrize("name", sorted(LIMIT))
def test_a_full_disk_ends_in_one_line_naming_the_file(name, teacher_onnx, tmp_path):
    (tmp_path / "tiny.toml").write_text(TINY_RECIPE)
    (tmp_path / "train.toml").write_text(TINY_TRAIN)
    inputs = {tmp_path / "tiny.toml", tmp_path / "train.toml"}

    def limit() -> None:
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)   # EFBIG instead of being killed
        resource.setrlimit(resource.RLIMIT_FSIZE, (LIMIT[name], LIMIT[name]))

    r = subprocess.run([PY, "-m", "limner.runtime.cli", *_argv(name, tmp_path, teacher_onnx)],
                       capture_output=True, text=True, timeout=600, preexec_fn=limit, cwd=REPO)
    where = f"rc {r.returncode}\n{r.stderr[-2000:]}"
    assert r.returncode == 1 and "Traceback" not in r.stderr, where
    last = r.stderr.strip().splitlines()[-1]
    assert last.startswith(f"limner {name}: error: ") and NAMES[name] in last, where
    assert "Errno" not in last and "libpng" not in r.stderr, where
    left = [f for f in tmp_path.rglob("*") if f.is_file() and f not in inputs]
    assert not [f for f in left if ".tmp" in f.name or ".partial" in f.name], left
    for f in left:
        _complete(f)
    if name == "capture":   # the frames written before the limit are kept
        assert sorted(f.name for f in left) == ["frame_000001.jpg", "frame_000002.jpg"]
    if name == "bench":     # all of the report or none of it
        assert not (tmp_path / "out").exists()


def test_a_full_disk_at_the_checkpoint_keeps_the_previous_one(teacher_onnx, tmp_path):
    """The checkpoint is serialised in memory and written atomically: past the limit the
    run ends in one line naming it (torch's zip writer failed with a RuntimeError before)."""
    (tmp_path / "train.toml").write_text(TINY_TRAIN)

    def limit() -> None:
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (LIMIT_CHECKPOINT, LIMIT_CHECKPOINT))

    r = subprocess.run([PY, "-m", "limner.runtime.cli", *_argv("train", tmp_path, teacher_onnx)],
                       capture_output=True, text=True, timeout=600, preexec_fn=limit, cwd=REPO)
    last = r.stderr.strip().splitlines()[-1]
    assert r.returncode == 1 and "Traceback" not in r.stderr, r.stderr[-2000:]
    assert last.startswith("limner train: error: ") and "checkpoint.pt: file too large" in last, last
    assert not (tmp_path / "out" / "checkpoint.pt").exists()
    assert not [f for f in (tmp_path / "out").iterdir() if ".tmp" in f.name]
