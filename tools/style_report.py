"""Style share and content similarity of models on held-out photos (bench/style_features.py).

For each model (a Limner .onnx file): every photo cover-cropped to 640x360 (as the bench
does), stylised, and scored against the style image at 320x180 with the HED trunk's
features. Prints a table and writes JSON; with --png, a side-by-side picture
(photo, then each model's output) for the first photos.

    python tools/style_report.py MODEL.onnx... --style ember --content runtime/assets/photos/heldout
"""
from __future__ import annotations

import argparse
import json
from pathlib import Path

import cv2
import numpy as np

from limner.runtime.images import cover_crop, list_images, read_image, write_image
from limner.bench.style_features import StyleScorer
from limner.runtime.model import load_model
from limner.runtime.styles import style_image


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("models", nargs="+", type=Path)
    ap.add_argument("--style", required=True, help="bundled style name or style image")
    ap.add_argument("--content", nargs="+", required=True, help="held-out photos or folders")
    ap.add_argument("--json", type=Path)
    ap.add_argument("--png", type=Path)
    a = ap.parse_args()
    style_bgr, _ = style_image(a.style)
    scorer = StyleScorer.open(style_bgr)
    photos = {p.stem: cover_crop(read_image(p), 640, 360) for p in list_images(a.content)}
    report, rows = {}, []
    for mp in a.models:
        m = load_model(mp)
        outs = {k: m.run(v) for k, v in photos.items()}
        per = {k: scorer.score(outs[k], photos[k]) for k in photos}
        mean = {s: float(np.mean([d[s] for d in per.values()])) for s in next(iter(per.values()))}
        report[str(mp)] = {"mean": mean, "per_photo": per}
        print(f"{mp}: style share {mean['style_share']:.3f}, content similarity "
              f"{mean['content_similarity']:.3f}  (" + ", ".join(
                  f"{k} {d['style_share']:.2f}/{d['content_similarity']:.2f}" for k, d in per.items()) + ")")
        print("  style share by layer: " + ", ".join(
            f"{k.removeprefix('style_share_')} {v:.3f}" for k, v in mean.items() if k.startswith("style_share_")))
        rows.append([outs[k] for k in photos])
    if a.json:
        a.json.write_text(json.dumps({"scorer": scorer.source, "models": report}, indent=1))
    if a.png:
        names = list(photos)[:4]
        cols = [np.concatenate([photos[n] for n in names], 0)]
        cols += [np.concatenate([r[list(photos).index(n)] for n in names], 0) for r in rows]
        img = np.concatenate(cols, 1)
        write_image(a.png, cv2.resize(img, (img.shape[1] // 2, img.shape[0] // 2), interpolation=cv2.INTER_AREA))


if __name__ == "__main__":
    main()
