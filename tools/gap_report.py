"""Where a student differs from its teacher, beyond scale (tools/scale_report.py splits by scale):

- edges: mean SSIM map (Wang et al. 2004, the bench's window) in bands by distance from the
  frame's edge, so a border effect of zero padding shows as a low first band;
- context: both models run on each quadrant of the frame alone, so whole-frame context is
  gone for both; if the student matched the teacher much better there, its frame context
  would be what falls short. Also how much each model's own output changes when the rest of
  the frame is taken away (quadrant alone against the same quadrant of the whole frame);
- colour layout: both outputs blurred (Gaussian, sigma 2 / 4 / 8 px): the mean absolute
  difference (grey levels) and the per-channel correlation of what is left once the texture
  is gone.

    python tools/gap_report.py TEACHER.onnx MODEL.onnx... --content runtime/assets/photos/heldout
"""
from __future__ import annotations

import cv2
import numpy as np

from limner.bench import compare_inputs
from limner.bench.metrics import ms_ssim, ssim_map

BANDS = (0, 8, 16, 32, 64)      # px from the frame's edge (the SSIM map starts 5 px in)
SIGMAS = (2, 4, 8)


def _edge_bands(maps: list[np.ndarray]) -> list[float]:
    m = np.mean(maps, axis=0)
    h, w = m.shape
    yy, xx = np.mgrid[:h, :w]
    d = np.minimum.reduce([yy, xx, h - 1 - yy, w - 1 - xx]) + 5
    edges = list(BANDS) + [10 ** 6]
    return [round(float(m[(d >= lo) & (d < hi)].mean()), 4) for lo, hi in zip(edges, edges[1:])]


def _quadrants(img: np.ndarray) -> list[tuple[slice, slice]]:
    h, w = img.shape[:2]
    return [(slice(y, y + h // 2), slice(x, x + w // 2)) for y in (0, h // 2) for x in (0, w // 2)]


def report(teacher, model, photos: list[np.ndarray]) -> dict:
    maps, quad, t_ctx, s_ctx, full = [], [], [], [], []
    low = {s: ([], []) for s in SIGMAS}
    for p in photos:
        t, s = teacher.run(p), model.run(p)
        full.append(ms_ssim(s, t))
        maps.append(ssim_map(s, t))
        for sig in SIGMAS:
            tl, sl = (cv2.GaussianBlur(x.astype(np.float32), (0, 0), sig) for x in (t, s))
            low[sig][0].append(float(np.abs(tl - sl).mean()))
            low[sig][1].append([float(np.corrcoef(tl[..., c].ravel(), sl[..., c].ravel())[0, 1])
                                for c in range(3)])
        for q in _quadrants(p):
            part = np.ascontiguousarray(p[q])
            tq, sq = teacher.run(part), model.run(part)
            quad.append(ms_ssim(sq, tq))
            t_ctx.append(ms_ssim(tq, t[q]))
            s_ctx.append(ms_ssim(sq, s[q]))
    return {
        "ms_ssim_whole_frame": round(float(np.mean(full)), 4),
        "ms_ssim_quadrants_alone": round(float(np.mean(quad)), 4),
        "teacher_quadrant_vs_whole": round(float(np.mean(t_ctx)), 4),
        "model_quadrant_vs_whole": round(float(np.mean(s_ctx)), 4),
        "ssim_by_edge_distance": dict(zip([f"{lo}-{hi}px" for lo, hi in zip(BANDS, BANDS[1:])] +
                                          [f"{BANDS[-1]}px+"], _edge_bands(maps))),
        "lowpass": {f"sigma{s}": {"mae": round(float(np.mean(v[0])), 2),
                                  "corr_rgb": [round(float(c), 3) for c in np.mean(v[1], axis=0)]}
                    for s, v in low.items()},
    }


def main() -> None:
    c = compare_inputs.parse(__doc__)
    rows = {name: report(c.teacher, m, c.photos) for name, m in c.models}
    for name, r in rows.items():
        print(f"{name}: MS-SSIM whole frame {r['ms_ssim_whole_frame']}, quadrants alone "
              f"{r['ms_ssim_quadrants_alone']} (context effect on the teacher "
              f"{r['teacher_quadrant_vs_whole']}, on the model {r['model_quadrant_vs_whole']})")
        print("  SSIM by distance from the edge: " +
              ", ".join(f"{k} {v}" for k, v in r["ssim_by_edge_distance"].items()))
        print("  blurred outputs: " + ", ".join(f"{k} MAE {v['mae']} corr {v['corr_rgb']}"
                                                for k, v in r["lowpass"].items()))
    c.write_json(rows)


if __name__ == "__main__":
    main()
