"""One side-by-side picture per style for docs/: the style image, held-out photos and
frames of the held-out street video, each above the output of every model given, one row
per model (640x360 inputs): a teacher alone, or a teacher and its students.

    python tools/teacher_sheet.py MODEL.onnx [MODEL.onnx ...] --style ember -o docs/ember-teacher.png \\
        [--photos runtime/assets/photos/heldout/{chelsea,squirrel}.jpg] [--frame 60 [200 ...]]
"""
from __future__ import annotations

import argparse
from pathlib import Path

import cv2
import numpy as np

from limner.runtime.images import cover_crop, read_image, write_image
from limner.runtime.bundled import HELD_OUT_PHOTOS, STREET_CLIP
from limner.runtime.model import load_model
from limner.runtime.styles import style_image


def _label(img: np.ndarray, text: str) -> np.ndarray:
    img = img.copy()
    cv2.rectangle(img, (0, 0), (img.shape[1], 24), (0, 0, 0), -1)
    cv2.putText(img, text, (6, 17), cv2.FONT_HERSHEY_SIMPLEX, 0.5, (255, 255, 255), 1, cv2.LINE_AA)
    return img


def video_frame(index: int) -> np.ndarray:
    cap = cv2.VideoCapture(str(STREET_CLIP))
    frame = None
    for _ in range(index + 1):
        ok, f = cap.read()
        if not ok:
            break
        frame = f
    cap.release()
    if frame is None:
        raise SystemExit(f"{STREET_CLIP}: no frame {index}")
    return frame


def sheet(model_paths: list[Path], style: str, photos: list[Path], frames: list[int]) -> np.ndarray:
    style_bgr, name = style_image(style)
    inputs = [(p.stem, cover_crop(read_image(p), 640, 360)) for p in photos]
    inputs += [(f"street video, frame {f}", cover_crop(video_frame(f), 640, 360)) for f in frames]
    sq = cv2.resize(style_bgr, (360, 360), interpolation=cv2.INTER_AREA)
    rows = [[_label(sq, f"style: {name}")] + [_label(i, f"held-out: {n}") for n, i in inputs]]
    for path in model_paths:
        m = load_model(path)
        label = m.meta.name or path.stem
        label = path.stem if label == "teacher" or path.stem.endswith("-int8") else label
        rows.append([np.full_like(sq, 255)] + [_label(m.run(i), label) for _, i in inputs])
    return np.concatenate([np.concatenate(r, 1) for r in rows], 0)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("model", type=Path, nargs="+", help="one row per model, in this order")
    ap.add_argument("--style", required=True)
    ap.add_argument("--photos", nargs="+", type=Path,
                    default=[HELD_OUT_PHOTOS / "chelsea.jpg", HELD_OUT_PHOTOS / "street-1.jpg"])
    ap.add_argument("--frame", type=int, nargs="+", default=[60], help="street video frame number(s)")
    ap.add_argument("--scale", type=float, default=0.6, help="output scale (keeps docs/ small)")
    ap.add_argument("-o", "--out", type=Path, required=True)
    a = ap.parse_args()
    img = sheet(a.model, a.style, a.photos, a.frame)
    img = cv2.resize(img, None, fx=a.scale, fy=a.scale, interpolation=cv2.INTER_AREA)
    a.out.parent.mkdir(parents=True, exist_ok=True)
    write_image(a.out, img)
    print(a.out)


if __name__ == "__main__":
    main()
