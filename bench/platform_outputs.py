"""The same frame through every bundled model, for comparing two platforms' runtimes.

`python -m limner.bench.platform_outputs -o OUT.npz [--frame FRAME.npy]` runs each bundled
model (runtime/bundled.py: the live default, the teacher, the candidate ladder) on one
frame with one inference thread and writes the uint8 outputs. Given no frame it takes the
held-out street photo, cover-cropped to 320x180, and writes that frame beside the outputs,
so that a second platform reads the identical pixels (its JPEG decoder is not part of the
comparison). `compare()` turns two such files into per-model differences and verdicts.
"""
from __future__ import annotations

import argparse
import json
import sys
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
from limner.runtime.errors import InputError

from ..runtime.bundled import CANDIDATES, HELD_OUT_PHOTOS, MODELS
from ..runtime.images import cover_crop, read_image
from ..runtime.model import load_model

FRAME_SIZE = (320, 180)
FRAME_PHOTO = HELD_OUT_PHOTOS / "street-1.jpg"
# Largest |difference| in units of 255 that one output pixel may show between platforms.
# fp32: the kernels differ only in summation order and fused multiply-adds (rounding
# at 1e-6 relative), so after the final rounding to uint8 a pixel may move by one unit, a
# few by more where a ReLU or clip sits on the edge: 3 units (common practice, no source).
FP32_TOLERANCE = 3
# int8: QDQ models requantize after every layer, so a one-step rounding difference at one
# layer (ARM's kernels take a different integer path; README "Running on a board") reaches
# the output scaled by the following layers. Limit: the same model's own int8 error, i.e.
# the largest difference between the int8 model and its fp32 parent on this frame on the
# reference platform; the platform may not differ by more than quantization itself does.
INT8_FLOOR = 3


def bundled_models() -> list[Path]:
    return sorted(MODELS.glob("*.onnx")) + sorted(CANDIDATES.glob("*.onnx"))


def reference_frame() -> np.ndarray:
    """(180, 320, 3) uint8 BGR."""
    return cover_crop(read_image(FRAME_PHOTO), *FRAME_SIZE)


def run_all(frame: np.ndarray, models: list[Path]) -> tuple[dict[str, np.ndarray], dict[str, dict]]:
    outputs: dict[str, np.ndarray] = {}
    info: dict[str, dict] = {}
    for path in models:
        m = load_model(path, threads=1)
        outputs[path.name] = m.run(frame)
        info[path.name] = {"precision": m.meta.precision, "parent": m.meta.parent,
                           "sha256": m.sha256(), "types": m.meta.calibration.get("types", "")}
    return outputs, info


def write(out: Path, frame: np.ndarray, outputs: dict[str, np.ndarray], info: dict[str, dict]) -> None:
    import platform

    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_suffix(".tmp.npz")
    meta = {"models": info, "machine": platform.machine()}
    np.savez_compressed(tmp, frame=frame, meta=np.array(json.dumps(meta)),
                        **{f"out/{k}": v for k, v in outputs.items()})
    tmp.replace(out)


def read(path: Path) -> tuple[np.ndarray, dict[str, np.ndarray], dict]:
    with np.load(path) as z:
        outs = {k[4:]: z[k] for k in z.files if k.startswith("out/")}
        return z["frame"], outs, json.loads(str(z["meta"]))


@dataclass
class Difference:
    model: str
    precision: str
    max_abs: int
    mean_abs: float
    tolerance: int
    ok: bool


def compare(reference: Path, other: Path) -> list[Difference]:
    """Per bundled model: how far `other`'s outputs lie from `reference`'s (same frame)."""
    f_ref, ref, meta_ref = read(reference)
    f_oth, oth, _ = read(other)
    if not np.array_equal(f_ref, f_oth):
        raise InputError(f"{other}: was run on a different frame than {reference}")
    by_sha = {i["sha256"]: name for name, i in meta_ref["models"].items()}
    diffs = []
    for name, y in sorted(ref.items()):
        info = meta_ref["models"][name]
        if name not in oth:
            diffs.append(Difference(name, info["precision"], 255, 255.0, 0, False))
            continue
        d = np.abs(y.astype(np.int16) - oth[name].astype(np.int16))
        tol = FP32_TOLERANCE
        if info["precision"] == "int8":
            parent = by_sha.get(info["parent"])
            own = int(np.abs(y.astype(np.int16) - ref[parent].astype(np.int16)).max()) if parent else 0
            tol = max(INT8_FLOOR, own)
        diffs.append(Difference(name, info["precision"], int(d.max()), float(d.mean()), tol,
                                int(d.max()) <= tol))
    return diffs


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m limner.bench.platform_outputs",
                                 description="run every bundled model on one frame")
    ap.add_argument("-o", "--out", type=Path, required=True, help="outputs file (.npz)")
    ap.add_argument("--frame", type=Path, help="the frame (.npz from another run; default: "
                                               "the held-out street photo at 320x180)")
    ap.add_argument("--compare", type=Path, help="a reference outputs file to compare with")
    a = ap.parse_args(argv)
    frame = read(a.frame)[0] if a.frame else reference_frame()
    outputs, info = run_all(frame, bundled_models())
    write(a.out, frame, outputs, info)
    print(f"{len(outputs)} models on a {frame.shape[1]}x{frame.shape[0]} frame -> {a.out}")
    if not a.compare:
        return 0
    diffs = compare(a.compare, a.out)
    print(json.dumps([asdict(d) for d in diffs], indent=1))
    return 0 if all(d.ok for d in diffs) else 1


if __name__ == "__main__":
    sys.exit(main())
