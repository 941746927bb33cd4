"""docs/architecture.md: runtime and bench run on a board without torch. Importing torch (and onnx)
is made to fail in a subprocess; everything the board needs must still work."""
from __future__ import annotations

import subprocess
from pathlib import Path

from conftest import PY

HERE = Path(__file__).parent


def _run(args, tmp_path, timeout=300):
    return subprocess.run([PY, str(HERE / "torch_blocker.py"), *args], capture_output=True,
                          text=True, timeout=timeout, cwd=tmp_path)


def test_blocker_really_blocks(tmp_path):
    (tmp_path / "probe.py").write_text("import torch\n")
    r = subprocess.run([PY, str(HERE / "torch_blocker.py"), "probe"], capture_output=True,
                       text=True, cwd=tmp_path, env={"PYTHONPATH": str(tmp_path)})
    assert r.returncode != 0 and "blocked for this test" in r.stderr


def test_every_runtime_and_bench_module_imports_without_torch(tmp_path):
    r = subprocess.run([PY, str(HERE / "torch_blocker.py"), "import_all"], capture_output=True,
                       text=True, cwd=tmp_path, env={"PYTHONPATH": str(HERE)}, timeout=300)
    assert r.returncode == 0, r.stderr
    n = int(r.stdout.split()[1])
    assert n >= 10


def test_cli_help_without_torch(tmp_path):
    r = _run(["limner.runtime.cli", "--help"], tmp_path)
    assert r.returncode == 0, r.stderr
    for sub in ("train", "export", "compress", "capture", "bench", "pick", "live"):
        assert sub in r.stdout


def test_version_names_the_installed_package_without_torch(tmp_path):
    # The version is the installed distribution's own (importlib.metadata, the standard
    # library's reader of the package metadata), not a second copy in the code.
    from importlib.metadata import version

    from limner.runtime.metadata import FORMAT_VERSION

    r = _run(["limner.runtime.cli", "--version"], tmp_path)
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == f"limner {version('limner')} (model format {FORMAT_VERSION})"


def test_live_on_demo_clip_without_torch(tmp_path):
    out = tmp_path / "clip.mp4"
    r = _run(["limner.runtime.cli", "live", "--headless", "--frames", "10", "--source", "demo",
              "--output", str(out)], tmp_path)
    assert r.returncode == 0, r.stderr
    assert "processed 10 frames" in r.stdout
    assert out.stat().st_size > 1000


def test_int8_probe_on_a_board_install_plus_onnx(tmp_path):
    # A board's core install plus onnx (what the probe asks for) has no torch and no sympy:
    # onnxruntime 1.32 no longer installs sympy, and its symbolic shape inference needs it
    # (found under aarch64 emulation, tools/arm_check.py). The probe must run without both.
    import os

    env = dict(os.environ, BLOCK_MODULES="torch,torchvision,sympy")
    r = subprocess.run([PY, str(HERE / "torch_blocker.py"), "limner.runtime.cli", "int8-probe",
                        "--resolution", "32x16", "--layers", "1", "--channels", "8", "--threads", "1"],
                       capture_output=True, text=True, cwd=tmp_path, env=env, timeout=300)
    assert r.returncode == 0, r.stderr[-1500:]
    assert "int8" in r.stdout


def test_torch_stage_says_what_to_install(tmp_path):
    r = _run(["limner.runtime.cli", "export", "x.pt", "-o", "y.onnx"], tmp_path)
    assert r.returncode == 2 and "compress extra" in r.stderr
