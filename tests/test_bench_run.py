"""A tiny end-to-end bench, run with torch blocked (the bench runs on a board without torch)."""
from __future__ import annotations

import csv
import json
import subprocess
from pathlib import Path

import pytest
import torch

from limner.compress import checkpoint as ck
from limner.runtime.hashing import file_sha256
from limner.compress.export import export
from limner.compress.registry import build

from conftest import PY, REPO

HERE = Path(__file__).parent
HELD_OUT = [str(REPO / "runtime/assets/photos/heldout/chelsea.jpg"), str(REPO / "runtime/assets/photos/heldout/street-1.jpg")]
TINY = """resolutions = ["320x192"]
quality_resolution = "320x192"
plot_resolution = "320x192"
warmup = 1
frames = 3
clip_frames = 3
"""


@pytest.fixture(scope="module")
def candidates(tmp_path_factory):
    d = tmp_path_factory.mktemp("cands")
    torch.manual_seed(0)
    for name, knobs, seen in (("tiny", dict(width=0.25, blocks=1, downscale=2, upsample="shuffle"), []),
                              ("leaky", dict(width=0.25, blocks=0), [file_sha256(Path(HELD_OUT[0]))])):
        net = build("student", **knobs)
        ck.save(ck.from_model(net, {"style": "t", "loss_network": "none", "data_sha256": seen}), d / f"{name}.pt")
        (d / name).mkdir()
        export(d / f"{name}.pt", d / name / f"{name}.onnx")
    (d / "tiny.toml").write_text(TINY)
    return d


def _bench(args, cwd):
    return subprocess.run([PY, str(HERE / "torch_blocker.py"), "limner.runtime.cli", "bench", *args],
                          capture_output=True, text=True, timeout=600, cwd=cwd)


def test_tiny_bench_without_torch(candidates, teacher_onnx, tmp_path):
    out = tmp_path / "report"
    r = _bench([str(candidates / "tiny"), "--teacher", str(teacher_onnx), "--content", *HELD_OUT,
                "--config", str(candidates / "tiny.toml"), "-o", str(out)], tmp_path)
    assert r.returncode == 0, r.stderr
    rep = json.loads((out / "report.json").read_text())
    assert rep["schema"] == 1 and [m["name"] for m in rep["models"]] == ["teacher", "tiny"]
    tiny = rep["models"][1]
    assert tiny["speed"][0]["resolution"] == "320x192" and tiny["speed"][0]["fps"] > 0
    assert 0 < tiny["fidelity"]["ms_ssim"]["mean"] < 1
    assert 0 < rep["floor"]["ms_ssim"]["mean"] <= 1
    assert "warp_error" in tiny["stability"]
    rows = list(csv.DictReader((out / "report.csv").open()))
    assert len(rows) == 2
    for f in ("report.md", "pareto.png", "samples.png"):
        assert (out / f).stat().st_size > 1000
    # the S-CIELAB figures carry the caveat that their constants are from memory
    assert "S-CIELAB caveat" in (out / "report.md").read_text()
    # no absolute paths: they are relative to the report folder, and pick turns them back
    for f in ("report.md", "report.csv", "report.json"):
        assert str(tmp_path) not in (out / f).read_text(), f
    paths = [rep["teacher"]] + [m["path"] for m in rep["models"]] + [h["path"] for h in rep["held_out"]]
    assert not [p for p in paths if Path(p).is_absolute()]
    from limner.bench.pick import load_report, model_path
    rep2 = load_report(out)
    assert Path(model_path(rep2, rep2["models"][1])).resolve() == (candidates / "tiny" / "tiny.onnx").resolve()
    # the style scores come from the trained trunk when its weights are here, else say why not
    sf = rep["style_features"]
    if "source" in sf:
        assert 0 < tiny["style"]["style_share"]["mean"] and 0 < tiny["style"]["content_similarity"]["mean"] <= 1
    else:
        assert sf["unavailable"] and tiny["style"] is None


def test_bench_refuses_held_out_images_a_model_saw(candidates, teacher_onnx, tmp_path):
    r = _bench([str(candidates / "leaky"), "--teacher", str(teacher_onnx), "--content", *HELD_OUT,
                "--config", str(candidates / "tiny.toml"), "-o", str(tmp_path / "rep")], tmp_path)
    assert r.returncode == 1
    assert "chelsea.jpg was among the images" in r.stderr and "Traceback" not in r.stderr


def test_peak_rss_is_the_model_process_own(candidates):
    """The speed subprocess reports its own peak memory, not its parent's: the kernel's
    per-process high-water mark (VmHWM in /proc/PID/status, proc(5)); ru_maxrss would carry
    the parent's peak across fork and exec (getrusage(2))."""
    from limner.bench.speed import measure_in_subprocess, peak_rss_mb

    ballast = bytearray(600 * 1024 * 1024)
    for i in range(0, len(ballast), 4096):   # touch every page so it is resident
        ballast[i] = 1
    parent = peak_rss_mb()
    assert parent > 600
    r = measure_in_subprocess(str(candidates / "tiny" / "tiny.onnx"), HELD_OUT[:1], [(64, 64)], [1], 0, 1)
    del ballast
    assert 20 < r["peak_rss_mb"] < parent - 300


def test_resolutions_flag_without_640x360_sets_the_plot_resolution(candidates, teacher_onnx, tmp_path):
    """`--resolutions 320x180` used to fail: "plot_resolution='640x360' is not among resolutions"."""
    cfg = tmp_path / "c.toml"
    cfg.write_text("warmup = 1\nframes = 3\nclip_frames = 3\nquality_resolution = \"320x192\"\n")
    out = tmp_path / "rep"
    r = _bench([str(candidates / "tiny"), "--teacher", str(teacher_onnx), "--content", *HELD_OUT,
                "--config", str(cfg), "--resolutions", "320x180", "-o", str(out)], tmp_path)
    assert r.returncode == 0, r.stderr
    assert json.loads((out / "report.json").read_text())["config"]["plot_resolution"] == "320x180"


def test_models_sharing_a_name_get_their_folder_in_the_report():
    """Two runs of one recipe make models of one name; the report must keep their rows and
    samples apart (common practice, no source)."""
    from types import SimpleNamespace as NS

    from limner.bench.run import display_names

    def model(path: str, name: str):
        return NS(path=Path(path), meta=NS(name=name))

    names = display_names([model("t/teacher.onnx", "teacher"), model("runs/a/half.onnx", "half"),
                           model("runs/b/half.onnx", "half"), model("runs/b/tiny.onnx", ""),
                           model("x/a/half.onnx", "half")])
    assert names[0] == "teacher" and names[2] == "b/half" and names[3] == "tiny"
    assert names[1].startswith("a/half") and names[4].startswith("a/half")  # two folders named a
    assert len(set(names)) == len(names), names
