"""The live runtime: reconnects, governor, shows, snapshots, clean exits."""
from __future__ import annotations

import datetime
import os
import signal
import subprocess
import threading
import time
from pathlib import Path

import cv2
import numpy as np
import pytest

from limner.runtime.config import ConfigError
from limner.runtime.governor import Governor
from limner.runtime.live_loop import Live
from limner.runtime.playlist import Playlist, is_open
from limner.runtime.settings import PlayItem, ShowConfig, load_show
from limner.runtime.unattended import Snapshots

from conftest import PY


class FlakyCamera:
    """A fake capture: frames, then a stall (read blocks), then failures, then frames again."""
    is_live = True
    description = "flaky camera"
    opens = 0
    script: list[str] = []

    def __init__(self):
        FlakyCamera.opens += 1
        self.n = 0
        self.mode = FlakyCamera.script[min(FlakyCamera.opens - 1, len(FlakyCamera.script) - 1)]

    def read(self):
        self.n += 1
        time.sleep(1 / 60)
        if self.mode == "stall_after_10" and self.n > 10:
            time.sleep(30)  # blocks like a camera whose driver hung
            return False, None
        if self.mode == "fail":
            return False, None
        return True, np.full((120, 160, 3), (self.n * 7) % 255, np.uint8)

    def release(self):
        pass


def _show(model: Path, **kw) -> ShowConfig:
    show = ShowConfig(play=[PlayItem(model=str(model), seconds=1e9)])
    show.inference.ladder = ["160x96"]
    show.capture.stall_s = 0.5
    show.display.window = False
    for k, v in kw.items():
        setattr(show, k, v)
    return show


def test_reconnect_after_stall_and_failure(teacher_onnx):
    FlakyCamera.opens = 0
    FlakyCamera.script = ["stall_after_10", "fail", "fail", "ok"]
    live = Live(_show(teacher_onnx), FlakyCamera, max_frames=40)
    live.capture.backoff_s = (0.05, 0.2)
    t = time.monotonic()
    stats = live.run()
    assert stats.frames >= 40           # kept producing output frames after recovering
    assert FlakyCamera.opens >= 4       # stalled, failed twice, reopened
    assert stats.reconnects >= 3
    # a hang guard, not a speed check: a stall must not block forever (generous: a loaded
    # two-core machine ran this test for minutes once)
    assert time.monotonic() - t < 300


def test_governor_steps_with_hysteresis():
    g = Governor([(320, 180), (480, 270), (640, 360)], target_fps=30, patience=5, cooldown_s=0.0)
    assert g.size == (640, 360)
    now = 0.0
    for _ in range(5):
        now += 0.05
        g.observe(1 / 20, now)          # 20 fps: too slow
    assert g.size == (480, 270)
    for _ in range(5):
        now += 0.05
        g.observe(1 / 40, now)          # 40 fps here predicts 22.5 at 640x360: stay
    assert g.size == (480, 270)
    for _ in range(5):
        now += 0.05
        g.observe(1 / 80, now)          # 80 fps predicts 45 at 640x360: step up
    assert g.size == (640, 360)
    pinned = Governor([(320, 180), (640, 360)], 30, enabled=False, patience=2)
    for _ in range(10):
        pinned.observe(1.0, 1.0)
    assert pinned.size == (640, 360)


def test_opening_hours():
    at = lambda h, m: datetime.datetime(2026, 12, 2, h, m)  # noqa: E731
    assert is_open([], at(3, 0))
    assert is_open(["10:00-18:00"], at(10, 0)) and not is_open(["10:00-18:00"], at(18, 0))
    assert is_open(["22:00-02:00"], at(1, 30)) and not is_open(["22:00-02:00"], at(12, 0))


@pytest.mark.parametrize("text,pattern", [
    ('crossfade = 2\n[[play]]\nmodel = "{model}"\n', "unknown key 'crossfade'"),
    ('[[play]]\nmodel = "nowhere.onnx"\n', "play model 'nowhere.onnx' not found"),
    ('[[play]]\nmodel = "{model}"\nstrength = 1.5\n', "strength=1.5"),
    ('[display]\nrotate = 45\n', "display.rotate=45"),
    ('[inference]\nworkers = -1\n', "inference.workers=-1"),
])
def test_show_files_name_the_problem(text, pattern, tmp_path, teacher_onnx):
    show = tmp_path / "show.toml"
    show.write_text(text.format(model=teacher_onnx))
    with pytest.raises(ConfigError, match=pattern):
        load_show(show)
    r = subprocess.run([PY, "-m", "limner.runtime.cli", "live", "--show", str(show), "--headless"],
                       capture_output=True, text=True, timeout=60)
    lines = r.stderr.strip().splitlines()
    assert r.returncode == 1 and len(lines) == 1 and str(show) in lines[0]


def test_bundled_show_files_load():
    for path in (Path(__file__).resolve().parents[1] / "configs" / "shows").glob("*.toml"):
        show = load_show(path)
        assert show.play


def test_hot_reload_keeps_running_model_when_new_file_is_bad(tmp_path, teacher_onnx):
    model = tmp_path / "look.onnx"
    model.write_bytes(teacher_onnx.read_bytes())
    pl = Playlist([PlayItem(model=str(model))], threads=1, crossfade_s=1.0, max_step=0.05)
    old = pl.current.model
    model.write_bytes(b"not a model")
    os.utime(model, (time.time() + 5, time.time() + 5))
    pl.tick(time.monotonic() + 10, 0.03)
    assert pl.current.model is old     # bad file: the old model keeps playing
    model.write_bytes(teacher_onnx.read_bytes())
    os.utime(model, (time.time() + 10, time.time() + 10))
    pl.tick(time.monotonic() + 20, 0.03)
    assert pl.current.model is not old  # good file: reloaded


def test_crossfade_is_bounded_per_frame(tmp_path, teacher_onnx):
    pl = Playlist([PlayItem(model=str(teacher_onnx)), PlayItem(model=str(teacher_onnx))],
                  threads=1, crossfade_s=0.1, max_step=0.05)
    pl.step(+1)
    pl.tick(time.monotonic(), 1.0)  # a long frame would finish a 0.1 s fade at once
    assert pl.fade == pytest.approx(0.05)


def test_snapshots_are_sequential_and_retained(tmp_path):
    snaps = Snapshots(str(tmp_path / "snaps"), keep=3)
    img = np.zeros((20, 30, 3), np.uint8)
    paths = [snaps.take(img) for _ in range(5)]
    assert [p.name for p in paths] == [f"snapshot_{i:06d}.png" for i in range(1, 6)]
    assert sorted(p.name for p in (tmp_path / "snaps").iterdir()) == [
        "snapshot_000003.png", "snapshot_000004.png", "snapshot_000005.png"]
    assert Snapshots("", keep=3).take(img) is None  # nothing stored unless a folder is set


def test_trigger_file_and_heartbeat(tmp_path, teacher_onnx):
    FlakyCamera.opens = 0
    FlakyCamera.script = ["ok"]
    show = _show(teacher_onnx)
    show.output.snapshot_dir = str(tmp_path / "snaps")
    show.output.trigger_file = str(tmp_path / "snap.now")
    show.output.heartbeat = str(tmp_path / "alive")
    live = Live(show, FlakyCamera, max_frames=60)
    threading.Timer(0.5, lambda: Path(show.output.trigger_file).touch()).start()
    live.run()
    assert len(list((tmp_path / "snaps").glob("snapshot_*.png"))) == 1
    assert not Path(show.output.trigger_file).exists()
    assert (tmp_path / "alive").exists()


def test_sigterm_finalises_the_recording(tmp_path, teacher_onnx):
    out = tmp_path / "rec.mp4"
    p = subprocess.Popen([PY, "-m", "limner.runtime.cli", "live", "--model", str(teacher_onnx), "--source",
                          "demo", "--loop", "--headless", "--resolution", "320x180", "--output", str(out)],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    time.sleep(4)
    p.send_signal(signal.SIGTERM)
    stdout, stderr = p.communicate(timeout=60)
    assert p.returncode == 0, stderr
    assert "processed" in stdout
    cap = cv2.VideoCapture(str(out))
    n = 0
    while cap.read()[0]:
        n += 1
    assert n >= 1                                   # a finished, readable file
    assert not list(tmp_path.glob(".*partial*"))    # nothing half-written left behind


@pytest.mark.parametrize("flag", ["--threads", "--workers"])
def test_negative_thread_or_worker_count_is_refused_by_name(flag, cli_env):
    """It used to process nothing, never end, and exit 0 on SIGINT."""
    r = subprocess.run([PY, "-m", "limner.runtime.cli", "live", "--source", "demo", "--headless",
                        "--frames", "3", flag, "-1"], capture_output=True, text=True, timeout=60, env=cli_env)
    assert r.returncode == 1
    assert f"{flag[2:]}=-1" in r.stderr and "Traceback" not in r.stderr


def test_os_errors_read_as_one_line_without_errno():
    from limner.runtime.cli import _one_line

    e = FileExistsError(17, "File exists", "out/x")
    assert _one_line(e) == "out/x: file exists"
    assert _one_line(ValueError("bad value\nmore")) == "bad value"


def test_a_missing_model_is_named_before_any_status_line(cli_env, tmp_path):
    r = subprocess.run([PY, "-m", "limner.runtime.cli", "live", "--model", str(tmp_path / "nope.onnx"),
                        "--source", "demo", "--headless", "--frames", "2", "--output", str(tmp_path / "o.mp4")],
                       capture_output=True, text=True, timeout=60, env=cli_env)
    assert r.returncode == 1 and "nope.onnx: no such model file" in r.stderr
    assert "playing" not in r.stdout and not (tmp_path / "o.mp4").exists()
