"""Where a student loses MS-SSIM to its teacher: the five per-scale terms (Wang, Simoncelli &
Bovik 2003; bench/metrics.py ms_ssim_scales), averaged over held-out photos and channels.

Beside the models it scores four changes of the teacher's own output, as yardsticks: a shift
by one pixel (what a student that paints the right strokes one pixel off would get), a
Gaussian blur of sigma 1, and down- and up-sampling by 2 and by 4 (what a student with a
perfect half- or quarter-resolution output would get). Low fine scales with high coarse ones
is stroke phase; low coarse scales is the regional colour and light layout.

    python tools/scale_report.py TEACHER.onnx MODEL.onnx... --content runtime/assets/photos/heldout
"""
from __future__ import annotations

import cv2
import numpy as np

from limner.bench import compare_inputs
from limner.bench.metrics import MS_WEIGHTS, ms_ssim_scales


def _resample(img: np.ndarray, k: int) -> np.ndarray:
    h, w = img.shape[:2]
    small = cv2.resize(img, (w // k, h // k), interpolation=cv2.INTER_AREA)
    return cv2.resize(small, (w, h), interpolation=cv2.INTER_LINEAR)


YARDSTICKS = {
    "teacher shifted 1 px": lambda t: np.roll(t, 1, axis=1),
    "teacher blurred (sigma 1)": lambda t: cv2.GaussianBlur(t, (0, 0), 1.0),
    "teacher at 1/2 res, upsampled": lambda t: _resample(t, 2),
    "teacher at 1/4 res, upsampled": lambda t: _resample(t, 4),
}


def _row(pairs: list[tuple[np.ndarray, np.ndarray]]) -> dict:
    per = np.stack([ms_ssim_scales(a, b) for a, b in pairs])           # (photos, channels, 5)
    overall = float(np.mean(np.prod(per ** MS_WEIGHTS, axis=2)))
    return {"ms_ssim": round(overall, 4), "scales": [round(float(v), 4) for v in per.mean(axis=(0, 1))]}


def main() -> None:
    c = compare_inputs.parse(__doc__)
    targets = [c.teacher.run(p) for p in c.photos]
    rows = {name: _row([(f(t), t) for t in targets]) for name, f in YARDSTICKS.items()}
    for name, m in c.models:
        rows[name] = _row([(m.run(p), t) for p, t in zip(c.photos, targets)])
    print(f"{'':34s} {'MS-SSIM':>8s}   scale 1 (finest) .. 5 (coarsest)")
    for name, r in rows.items():
        print(f"{name:34s} {r['ms_ssim']:8.3f}   " + "  ".join(f"{v:.3f}" for v in r["scales"]))
    c.write_json(rows)


if __name__ == "__main__":
    main()
