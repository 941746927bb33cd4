"""A corpus of bad inputs for the CLI: each case must end with a non-zero exit, no traceback,
a last line that names the bad value, and no partial output left behind.

Each case builds its inputs in a fresh folder and runs `limner ...` in a subprocess, as a
user would. The expectations are Limner's own contract (README "The subcommands"); the
truncated and foreign files are made with onnx's helper (the ONNX reference package) and
OpenCV's writer, so the bad files are what those tools would produce, not hand-made bytes.
"""
from __future__ import annotations

import subprocess
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import pytest

from conftest import PY, REPO

DEFAULT = REPO / "runtime" / "assets" / "models" / "default.onnx"
CLIP = REPO / "runtime" / "assets" / "clips" / "street.mp4"
PHOTO = REPO / "runtime" / "assets" / "photos" / "heldout" / "chelsea.jpg"
TEACHER = REPO / "runtime" / "assets" / "models" / "ember-teacher.onnx"


@dataclass
class Case:
    name: str
    argv: Callable[[Path], list[str]]      # folder -> arguments after `limner`
    names: Callable[[Path], str]           # folder -> text the last line must contain
    leaves_nothing: str = ""               # a path (relative to the folder) that must not exist


def _truncated_model(d: Path) -> Path:
    p = d / "cut.onnx"
    p.write_bytes(DEFAULT.read_bytes()[:2000])
    return p


def _identity_graph(elem_type: int):
    """A valid ONNX model (Identity on NHWC of the given element type)."""
    from onnx import helper

    x = helper.make_tensor_value_info("x", elem_type, [1, None, None, 3])
    y = helper.make_tensor_value_info("y", elem_type, [1, None, None, 3])
    g = helper.make_graph([helper.make_node("Identity", ["x"], ["y"])], "g", [x], [y])
    return helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])


def _foreign_model(d: Path) -> Path:
    """A valid uint8 ONNX file without Limner's metadata."""
    import onnx

    p = d / "foreign.onnx"
    onnx.save(_identity_graph(onnx.TensorProto.UINT8), p)
    return p


def _float_input_model(d: Path) -> Path:
    """Limner's metadata copied from the bundled model onto a float-input graph."""
    import onnx

    m = _identity_graph(onnx.TensorProto.FLOAT)
    for prop in onnx.load(DEFAULT, load_external_data=False).metadata_props:
        m.metadata_props.add(key=prop.key, value=prop.value)
    p = d / "float.onnx"
    onnx.save(m, p)
    return p


def _file(name: str, data: bytes) -> Callable[[Path], Path]:
    def make(d: Path) -> Path:
        (d / name).write_bytes(data)
        return d / name
    return make


def _cut_video(d: Path) -> Path:
    """The demo clip cut off mid-file (its index at the end is lost)."""
    p = d / "cut.mp4"
    p.write_bytes(CLIP.read_bytes()[: CLIP.stat().st_size // 3])
    return p


def _toml(name: str, text: str) -> Callable[[Path], Path]:
    return _file(name, text.encode())


def _live(model: Callable[[Path], Path]) -> Callable[[Path], list[str]]:
    return lambda d: ["live", "--model", str(model(d)), "--source", "demo", "--headless",
                      "--frames", "2", "--output", str(d / "out.mp4")]


def _live_source(src: Callable[[Path], Path]) -> Callable[[Path], list[str]]:
    return lambda d: ["live", "--source", str(src(d)), "--headless", "--frames", "2",
                      "--output", str(d / "out.mp4")]


def _show(text: str) -> Callable[[Path], list[str]]:
    return lambda d: ["live", "--show", str(_toml("show.toml", text)(d)), "--source", "demo",
                      "--headless", "--frames", "2"]


def _bench_config(text: str) -> Callable[[Path], list[str]]:
    return lambda d: ["bench", str(DEFAULT), "--teacher", str(TEACHER), "--content", str(PHOTO),
                      "--config", str(_toml("bench.toml", text)(d)), "-o", str(d / "report")]


CASES = [
    # model files
    Case("missing model", _live(lambda d: d / "nope.onnx"), lambda d: "nope.onnx", "out.mp4"),
    Case("zero-byte model", _live(_file("empty.onnx", b"")), lambda d: "empty.onnx", "out.mp4"),
    Case("text file as model", _live(_file("notes.onnx", b"hello\n" * 50)),
         lambda d: "notes.onnx", "out.mp4"),
    Case("truncated model", _live(_truncated_model), lambda d: "cut.onnx", "out.mp4"),
    Case("foreign ONNX model", _live(_foreign_model), lambda d: "not a Limner model", "out.mp4"),
    Case("float-input model with valid metadata", _live(_float_input_model),
         lambda d: "tensor(uint8)", "out.mp4"),
    Case("folder as model", _live(lambda d: d), lambda d: "folder", "out.mp4"),
    # sources
    Case("missing video", _live_source(lambda d: d / "gone.mp4"), lambda d: "gone.mp4", "out.mp4"),
    Case("zero-byte video", _live_source(_file("zero.mp4", b"")), lambda d: "zero.mp4", "out.mp4"),
    Case("video cut mid-file", _live_source(_cut_video), lambda d: "cut.mp4", "out.mp4"),
    Case("text file as video", _live_source(_file("clip.avi", b"not a video\n" * 100)),
         lambda d: "clip.avi", "out.mp4"),
    # show files
    Case("malformed show TOML", _show("[playlist\nmodel = 1\n"), lambda d: "show.toml"),
    Case("unknown show key", _show("colour_grade = 2\n"), lambda d: "colour_grade"),
    Case("wrong-typed show value", _show("[inference]\nthreads = \"two\"\n"), lambda d: "two"),
    Case("missing show file", lambda d: ["live", "--show", str(d / "none.toml"), "--headless"],
         lambda d: "none.toml"),
    # bench config
    Case("unknown bench key", _bench_config("warm_up = 3\n"), lambda d: "warm_up", "report"),
    Case("wrong-typed bench value", _bench_config("resolutions = 640\n"), lambda d: "640", "report"),
    # flags
    Case("live resolution not WxH", lambda d: ["live", "--resolution", "wide", "--headless",
                                               "--frames", "1"], lambda d: "wide"),
    Case("live zero resolution", lambda d: ["live", "--resolution", "0x0", "--headless",
                                            "--frames", "1"], lambda d: "0x0"),
    Case("live negative frames", lambda d: ["live", "--frames", "-3", "--headless"], lambda d: "-3"),
    Case("live negative threads", lambda d: ["live", "--threads", "-1", "--headless",
                                             "--frames", "1"], lambda d: "-1"),
    Case("live unknown container", lambda d: ["live", "--source", "demo", "--headless", "--frames",
                                              "1", "--output", str(d / "out.xyz")],
         lambda d: ".xyz", "out.xyz"),
    Case("capture zero frames", lambda d: ["capture", "--source", "demo", "--frames", "0", "-o",
                                           str(d / "cap")], lambda d: "0", "cap"),
    Case("capture missing camera", lambda d: ["capture", "--source", "/dev/video97", "--frames",
                                              "2", "-o", str(d / "cap")],
         lambda d: "/dev/video97", "cap"),
    Case("bench bad resolution", lambda d: ["bench", str(DEFAULT), "--teacher", str(TEACHER),
                                            "--content", str(PHOTO), "--resolutions", "640x",
                                            "-o", str(d / "report")], lambda d: "640x", "report"),
    Case("bench missing teacher", lambda d: ["bench", str(DEFAULT), "--teacher", str(d / "t.onnx"),
                                             "--content", str(PHOTO), "-o", str(d / "report")],
         lambda d: "t.onnx", "report"),
    Case("pick missing report", lambda d: ["pick", str(d / "nothing")], lambda d: "nothing"),
    Case("pick threshold not a number", lambda d: ["pick", str(d), "--min-fps", "fast"],
         lambda d: "fast"),
    # outputs
    Case("live output under a file", lambda d: ["live", "--source", "demo", "--headless",
                                                "--frames", "1", "--output",
                                                str(_file("f.txt", b"x")(d) / "out.mp4")],
         lambda d: "f.txt"),
    Case("bench output is a file", lambda d: ["bench", str(DEFAULT), "--teacher", str(TEACHER),
                                              "--content", str(PHOTO), "-o",
                                              str(_file("report", b"x")(d))], lambda d: "report"),
    Case("capture into a file", lambda d: ["capture", "--source", "demo", "--frames", "2", "-o",
                                           str(_file("cap", b"x")(d))], lambda d: "cap"),
    Case("train into a file", lambda d: ["train", "ember", "--content", str(PHOTO), "--steps", "2",
                                         "-o", str(_file("run", b"x")(d))], lambda d: "run"),
    Case("compress into a file", lambda d: ["compress", str(TEACHER), "--content",
                                            str(PHOTO), "-o", str(_file("cands", b"x")(d))],
         lambda d: "cands"),
]


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_bad_input_ends_in_one_clear_line(case: Case, tmp_path: Path) -> None:
    argv = case.argv(tmp_path)
    r = subprocess.run([PY, "-m", "limner.runtime.cli", *argv], capture_output=True, text=True,
                       cwd=tmp_path, timeout=300)
    assert r.returncode != 0, (argv, r.stdout[-500:])
    assert "Traceback" not in r.stderr, r.stderr[-2000:]
    lines = r.stderr.strip().splitlines()
    assert lines, "no message at all"
    last = lines[-1]
    assert last.startswith(f"limner {argv[0]}: "), last
    assert case.names(tmp_path) in last, last
    if case.leaves_nothing:
        assert not (tmp_path / case.leaves_nothing).exists(), f"{case.leaves_nothing} left behind"


@pytest.mark.parametrize("error, one_line", [
    (lambda: __import__("limner.runtime.errors", fromlist=["InputError"]).InputError("--threads -1: bad"), True),
    (lambda: OSError(28, "No space left on device", "out/report.md"), True),
    (lambda: PermissionError(13, "Permission denied", "/root/x"), True),
    (lambda: ValueError("operands could not be broadcast"), False),   # a defect: traceback kept
    (lambda: OSError(5, "Input/output error"), False),
    (lambda: KeyError("rows"), False),
])
def test_only_the_users_errors_become_one_line(monkeypatch, capsys, error, one_line):
    """runtime/errors.py: a value the user gave, or their files and disk, is one line and
    exit 1; any other exception is Limner's defect and must keep its traceback (before the
    fix every ValueError and OSError became one line)."""
    from limner.runtime import cli

    def boom(a):
        raise error()

    monkeypatch.setattr(cli, "SUBCOMMANDS", [(n, add, boom) for n, add, _ in cli.SUBCOMMANDS])
    if one_line:
        assert cli.main(["pick", "nowhere.json"]) == 1
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and err[0].startswith("limner pick: error: ")
        assert "Errno" not in err[0]
    else:
        with pytest.raises(type(error())):
            cli.main(["pick", "nowhere.json"])
