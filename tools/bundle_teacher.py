"""Bundle a finished teacher run: the model, a weights-only checkpoint, its record and its docs
picture, the same way for every style.

    python tools/bundle_teacher.py runs/tidepool-hed --style tidepool

writes runtime/assets/models/STYLE-teacher.onnx (the run's teacher.onnx),
compress/assets/STYLE-teacher.pt (weights, metadata, step count; no optimizer or RNG state),
work/teachers/STYLE/ (config.toml, losses.csv, the last preview, style-report.json from
tools/style_report.py on the held-out photos) and docs/STYLE-teacher.png
(tools/teacher_sheet.py).
"""
from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("run", type=Path, help="a finished `limner train` run folder")
    ap.add_argument("--style", required=True, help="bundled style name")
    a = ap.parse_args(argv)
    from limner.compress import checkpoint as ck

    onnx_path, ckpt_path = a.run / "teacher.onnx", a.run / "checkpoint.pt"
    for p in (onnx_path, ckpt_path, a.run / "losses.csv", a.run / "config.toml"):
        if not p.is_file():
            ap.error(f"{p}: missing (is the run finished?)")
    c = ck.load(ckpt_path)
    ck.save(ck.weights_only(c), REPO / "compress" / "assets" / f"{a.style}-teacher.pt")
    model = REPO / "runtime" / "assets" / "models" / f"{a.style}-teacher.onnx"
    shutil.copy(onnx_path, model)
    record = REPO / "work" / "teachers" / a.style
    record.mkdir(parents=True, exist_ok=True)
    for name in ("config.toml", "losses.csv"):
        shutil.copy(a.run / name, record / name)
    previews = sorted((a.run / "previews").glob("step*.png"))
    if previews:
        for old in record.glob("preview-step*.png"):
            old.unlink()
        shutil.copy(previews[-1], record / f"preview-{previews[-1].stem.replace('step00', 'step')}.png")
    tools = REPO / "tools"
    subprocess.run([sys.executable, str(tools / "style_report.py"), str(model), "--style", a.style,
                    "--content", str(REPO / "runtime" / "assets" / "photos" / "heldout"),
                    "--json", str(record / "style-report.json")], check=True)
    subprocess.run([sys.executable, str(tools / "teacher_sheet.py"), str(model), "--style", a.style,
                    "-o", str(REPO / "docs" / f"{a.style}-teacher.png")], check=True)
    print(f"bundled {a.style}: {model.relative_to(REPO)}, compress/assets/{a.style}-teacher.pt, "
          f"{record.relative_to(REPO)}/, docs/{a.style}-teacher.png")
    return 0


if __name__ == "__main__":
    sys.exit(main())
