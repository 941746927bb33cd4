"""Teacher training: the loss falls, resume is exact, a killed run continues."""
from __future__ import annotations

import csv
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import torch

from limner.compress import checkpoint as ck
from limner.compress.train import TrainConfig, TrainError, train

REPO = Path(__file__).resolve().parents[1]
PHOTO = str(REPO / "runtime" / "assets" / "photos" / "train" / "dog.jpg")


def _cfg(**kw) -> TrainConfig:
    base = dict(size=48, batch=2, steps=6, checkpoint_every=3, preview_every=3,
                loss_net="random", threads=1, style_size=64)
    base.update(kw)
    return TrainConfig(**base)


def _losses(run: Path) -> list[float]:
    return [float(r["total"]) for r in csv.DictReader((run / "losses.csv").open())]


def test_short_run_lowers_total_loss(tmp_path):
    train("ember", [PHOTO, "scenes:4"], tmp_path / "r", _cfg(steps=40, checkpoint_every=40,
                                                              preview_every=40), export_onnx=False)
    losses = _losses(tmp_path / "r")
    first, last = losses[0], sum(losses[-5:]) / 5
    assert last <= 0.7 * first, (first, last)  # issue criterion: at most 0.7 of its first value
    assert (tmp_path / "r" / "previews" / "step000040.png").stat().st_size > 0
    assert (tmp_path / "r" / "config.toml").exists()


def test_resume_continues_at_saved_step_with_same_optimizer_state(tmp_path):
    straight = tmp_path / "straight"
    train("ember", [PHOTO], straight, _cfg(steps=6), export_onnx=False)
    split = tmp_path / "split"
    train("ember", [PHOTO], split, _cfg(steps=3), export_onnx=False)
    mid = ck.load(split / "checkpoint.pt")
    assert mid.train_state["step"] == 3 and mid.train_state["optimizer"]["state"]
    train("ember", [PHOTO], split, _cfg(steps=6), resume=True, export_onnx=False)
    a, b = ck.load(straight / "checkpoint.pt"), ck.load(split / "checkpoint.pt")
    assert b.train_state["step"] == 6
    for k in a.state_dict:  # same weights as the uninterrupted run
        assert torch.allclose(a.state_dict[k], b.state_dict[k], atol=1e-6), k
    assert _losses(straight) == pytest.approx(_losses(split), rel=1e-5)


def test_existing_run_needs_resume(tmp_path):
    train("ember", [PHOTO], tmp_path / "r", _cfg(steps=3), export_onnx=False)
    with pytest.raises(TrainError, match="pass --resume"):
        train("ember", [PHOTO], tmp_path / "r", _cfg(steps=3), export_onnx=False)


def test_killed_run_resumes_from_last_checkpoint(tmp_path):
    run = tmp_path / "r"
    args = [sys.executable, "-m", "limner.runtime.cli", "train", "ember", "--content", PHOTO,
            "-o", str(run), "--size", "48", "--batch", "1", "--steps", "400", "--loss-net",
            "random", "--threads", "1"]
    cfg = tmp_path / "c.toml"
    cfg.write_text("checkpoint_every = 2\npreview_every = 1000\nstyle_size = 64\n")
    p = subprocess.Popen(args + ["--config", str(cfg)], stdout=subprocess.DEVNULL,
                         stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            if (run / "checkpoint.pt").exists() and ck.load(run / "checkpoint.pt").train_state["step"] >= 4:
                break
            time.sleep(0.2)
        os.kill(p.pid, signal.SIGKILL)  # no chance to save: only the last checkpoint survives
    finally:
        p.wait()
    saved = ck.load(run / "checkpoint.pt").train_state["step"]
    assert saved >= 4
    r = subprocess.run(args[:-8] + ["--steps", str(saved + 2), "--resume", "--config", str(cfg)],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert f"resuming {run / 'checkpoint.pt'} at step {saved}" in r.stdout
    assert ck.load(run / "checkpoint.pt").train_state["step"] == saved + 2
    steps = [int(r["step"]) for r in csv.DictReader((run / "losses.csv").open())]
    assert steps == list(range(1, saved + 3))  # the log has no rows from the lost steps
    assert (run / "teacher.onnx").exists()


def test_init_starts_from_another_teacher_and_refuses_other_nets(tmp_path):
    """A warm start copies the given teacher's weights exactly (step 0 output equals it)."""
    train("ember", [PHOTO], tmp_path / "a", _cfg(steps=3), export_onnx=False)
    first = ck.load(tmp_path / "a" / "checkpoint.pt")
    from limner.compress.train import _warm_start
    from limner.compress.registry import build

    net = build("teacher")
    sha = _warm_start(net, tmp_path / "a" / "checkpoint.pt")
    assert len(sha) == 64
    assert all(torch.equal(v, first.state_dict[k]) for k, v in net.state_dict().items())
    train("woodcut", [PHOTO], tmp_path / "b", _cfg(steps=3, init=str(tmp_path / "a" / "checkpoint.pt")),
          export_onnx=False)
    assert ck.load(tmp_path / "b" / "checkpoint.pt").meta["init_sha256"] == sha
    student = build("student", width=0.25, blocks=1)
    ck.save(ck.from_model(student, {}), tmp_path / "s.pt")
    with pytest.raises(TrainError, match="not a teacher"):
        _warm_start(build("teacher"), tmp_path / "s.pt")
    with pytest.raises(TrainError, match="no such checkpoint"):
        _warm_start(build("teacher"), tmp_path / "none.pt")


def test_unreadable_content_is_reported_not_skipped_silently(tmp_path, capsys):
    d = tmp_path / "content"
    d.mkdir()
    (d / "notes.png").write_text("not an image")
    good = open(PHOTO, "rb").read()
    (d / "cut.jpg").write_bytes(good[: len(good) // 50])  # a truncated JPEG
    (d / "ok.jpg").write_bytes(good)
    train("ember", [str(d)], tmp_path / "r", _cfg(steps=1), export_onnx=False)
    out = capsys.readouterr().out
    assert "skipped" in out and "notes.png" in out
