"""How much a student's frame context carries: each frame-context student (a checkpoint) is
scored against its teacher on held-out photos three ways, with the frame statistics it
pools from the photo itself (what it does at run time), with the mean of all the photos'
statistics, and with the next photo's statistics. The drop from the first to the others is
what the frame context contributes; a student whose context did nothing would score the
same three times.

    python tools/context_report.py TEACHER.onnx STUDENT.pt... --content runtime/assets/photos/heldout \\
        [--json work/ember-ladder/context-r7.json]
"""
from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np
import torch

from limner.bench.metrics import ms_ssim
from limner.compress import checkpoint as ckptmod
from limner.compress.export import frame_tensor, stylise
from limner.runtime.images import cover_crop, list_images, read_image
from limner.runtime.model import load_model


def report(net: torch.nn.Module, photos: list[np.ndarray], targets: list[np.ndarray]) -> dict:
    stats = [net.frame_stats(frame_tensor(p)) for p in photos]
    mean = tuple(torch.stack(s).mean(0) for s in zip(*stats))
    ways = {"own": lambda k: stats[k], "mean of all": lambda k: mean,
            "next photo's": lambda k: stats[(k + 1) % len(stats)]}
    out = {}
    for name, pick in ways.items():
        scores = [ms_ssim(stylise(net, photos[k], stats=pick(k)), targets[k]) for k in range(len(photos))]
        out[name] = {"ms_ssim": round(float(np.mean(scores)), 4),
                     "per_photo": [round(float(s), 4) for s in scores]}
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("teacher", type=Path)
    ap.add_argument("students", nargs="+", type=Path, help="student checkpoints with frame context")
    ap.add_argument("--content", nargs="+", required=True, help="held-out photos or folders")
    ap.add_argument("--json", type=Path)
    a = ap.parse_args()
    try:
        photos = [cover_crop(read_image(p), 640, 360) for p in list_images(a.content)]
        teacher = load_model(a.teacher)
    except (OSError, ValueError) as e:
        ap.error(str(e))
    if not photos:
        ap.error(f"no photos in {' '.join(a.content)}")
    targets = [teacher.run(p) for p in photos]
    rows = {}
    for path in a.students:
        try:
            net = ckptmod.load(path).model().eval()
        except ckptmod.CheckpointError as e:
            ap.error(str(e))
        if not getattr(net, "context_points", None):
            ap.error(f"{path}: not a student with frame context")
        rows[str(path)] = report(net, photos, targets)
        print(path, "  ".join(f"{k}: {v['ms_ssim']:.3f}" for k, v in rows[str(path)].items()), flush=True)
    if a.json:
        a.json.parent.mkdir(parents=True, exist_ok=True)
        a.json.write_text(json.dumps({"teacher": str(a.teacher), "photos": len(photos),
                                      "resolution": "640x360", "rows": rows}, indent=2) + "\n")


if __name__ == "__main__":
    main()
