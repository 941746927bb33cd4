"""SIGINT and SIGTERM at seeded random points of every long subcommand, as an operator's
Ctrl-C or a service manager's stop would arrive: each run must end with one clear line, an
exit status that says how it ended (130 / 143, the shell's 128 + signal number; 0 where
stopping is the normal way to end: `live` and `capture`), no traceback, no half-written
file (no temp file left, every file left complete and readable), and nothing lost that was
already written (a resumable run continues from its checkpoint).

The fast default sends each signal once per subcommand at a seeded point; `-m slow` adds
more points. Timing is not asserted (these machines are shared): a signal that lands
after the work finished is a normal exit, checked the same way.
"""
from __future__ import annotations

import json
import random
import signal
import subprocess
import time
from pathlib import Path

import cv2
import pytest

from conftest import PY, REPO
from test_compress import PHOTOS, TINY_RECIPE

DEFAULT = REPO / "runtime" / "assets" / "models" / "default.onnx"
TEACHER = REPO / "runtime" / "assets" / "models" / "ember-teacher.onnx"
PHOTO = REPO / "runtime" / "assets" / "photos" / "heldout" / "chelsea.jpg"
CLIP = REPO / "runtime" / "assets" / "clips" / "street.mp4"
TRAIN = REPO / "runtime" / "assets" / "photos" / "train"
TINY_TRAIN = "size = 32\nbatch = 1\nsteps = 60\nstyle_size = 64\ncheckpoint_every = 5\npreview_every = 1000\n"


def _long_clip(d: Path, frames: int = 6000) -> Path:
    """A video long enough that a capture is still running when the signal lands (the bundled
    clip has 150 frames, which a fast host captures before the earliest signal): the street
    clip's frames at 320x180, repeated, as MJPG."""
    path = d / "long.avi"
    if path.exists():
        return path
    cap = cv2.VideoCapture(str(CLIP))
    clip = []
    while True:
        ok, frame = cap.read()
        if not ok:
            break
        clip.append(cv2.resize(frame, (320, 180), interpolation=cv2.INTER_AREA))
    cap.release()
    out = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), 30.0, (320, 180))
    for i in range(frames):
        out.write(clip[i % len(clip)])
    out.release()
    return path


def _argv(name: str, d: Path, teacher_onnx: Path) -> list[str]:
    out = d / "out"
    return {
        "bench": ["bench", str(DEFAULT), "--teacher", str(TEACHER), "--content", str(PHOTO),
                  "--resolutions", "320x180", "--frames", "5", "-o", str(out)],
        "capture": ["capture", "--source", str(_long_clip(d)), "--frames", "9000", "-o", str(out)],
        "live": ["live", "--source", str(CLIP), "--loop", "--headless", "--frames", "0",
                 "--output", str(d / "show.mp4")],
        "int8-probe": ["int8-probe"],
        "train": ["train", "ember", "--content", str(TRAIN), "--config", str(d / "train.toml"),
                  "--loss-net", "random", "-o", str(out)],
        "compress": ["compress", str(teacher_onnx), "--content", *PHOTOS, "scenes:3",
                     "--recipe", str(d / "tiny.toml"), "-o", str(out)],
    }[name]


# how each subcommand may end when stopped: (exit codes, what its last line may say); train
# and compress say how to continue once they have something saved, before it "interrupted"
ENDS = {"bench": ({130, 143}, ("interrupted",)), "int8-probe": ({130, 143}, ("interrupted",)),
        "train": ({130, 143}, ("continue with --resume", "interrupted")),
        "compress": ({130, 143}, ("Run the same command again",)),
        "capture": ({0}, ("wrote",)), "live": ({0}, ("processed",))}
# seconds after the start within which the signal lands (the work itself takes longer)
WINDOW = {"bench": (1.0, 8.0), "int8-probe": (1.0, 6.0), "train": (3.0, 8.0), "compress": (3.0, 15.0),
          "capture": (1.0, 3.0), "live": (2.0, 6.0)}


def _complete(path: Path) -> None:
    """A file left behind must be whole: it parses or decodes with its own reader."""
    if path.suffix == ".json":
        json.loads(path.read_text())
    elif path.suffix == ".onnx":
        import onnx
        onnx.checker.check_model(onnx.load(str(path)))
    elif path.suffix in (".jpg", ".png"):
        assert cv2.imread(str(path)) is not None, f"{path}: does not decode"
    elif path.suffix == ".mp4":
        cap = cv2.VideoCapture(str(path))
        ok, _ = cap.read()
        cap.release()
        assert ok, f"{path}: no frame decodes"
    elif path.suffix == ".pt":
        import torch
        torch.load(path, map_location="cpu", weights_only=True)


def _stop_at(name: str, sig: signal.Signals, delay: float, d: Path, teacher_onnx: Path) -> None:
    (d / "tiny.toml").write_text(TINY_RECIPE)
    (d / "train.toml").write_text(TINY_TRAIN)
    p = subprocess.Popen([PY, "-m", "limner.runtime.cli", *_argv(name, d, teacher_onnx)],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    time.sleep(delay)
    if p.poll() is None:
        p.send_signal(sig)
    out, err = p.communicate(timeout=300)
    where = f"{name} {sig.name} at {delay:.1f} s: rc {p.returncode}\n{err[-2000:]}"
    assert "Traceback" not in err, where
    codes, says = ENDS[name]
    finished = p.returncode == 0 and name not in ("capture", "live")
    if not finished:
        assert p.returncode in codes, where
        last = (err.strip().splitlines() or [""])[-1] if p.returncode else (out.strip().splitlines() or [""])[-1]
        assert any(x in last for x in says), where
    left = [f for f in d.rglob("*") if f.is_file() and f.name not in ("tiny.toml", "train.toml", "long.avi")]
    assert not [f for f in left if f.name.endswith(".tmp")], f"{where}\ntemp files left: {left}"
    for f in left:
        _complete(f)
    if name == "train" and (d / "out" / "checkpoint.pt").exists():   # nothing lost: it resumes
        r = subprocess.run([PY, "-m", "limner.runtime.cli", *_argv(name, d, teacher_onnx), "--resume",
                            "--steps", "61"], capture_output=True, text=True, timeout=600)
        assert r.returncode == 0, r.stderr[-2000:]


SUBCOMMANDS = sorted(ENDS)


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
@pytest.mark.parametrize("name", SUBCOMMANDS)
def test_a_signal_mid_run_ends_cleanly(name, sig, teacher_onnx, tmp_path):
    lo, hi = WINDOW[name]
    _stop_at(name, sig, random.Random(f"{name}-{sig.name}").uniform(lo, hi), tmp_path, teacher_onnx)


@pytest.mark.slow
@pytest.mark.parametrize("k", range(3))
@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
@pytest.mark.parametrize("name", SUBCOMMANDS)
def test_signals_at_more_points(name, sig, k, teacher_onnx, tmp_path):
    lo, hi = WINDOW[name]
    _stop_at(name, sig, random.Random(f"{name}-{sig.name}-{k}").uniform(0.2, hi), tmp_path, teacher_onnx)
