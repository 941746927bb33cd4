"""Writing a bench report: report.json, report.csv, report.md, pareto.png, samples.png."""
from __future__ import annotations

import csv
import json
import os
import shutil
import tempfile
from pathlib import Path

import cv2
import numpy as np
from limner.runtime.images import write_image

from .axes import QUALITY, speed_at
from .plots import pareto_plot


def flat_rows(rep: dict) -> list[dict]:
    out = []
    teacher = next(r for r in rep["models"] if r["is_teacher"])
    by_sha = {r["sha256"]: r for r in rep["models"]}
    for r in rep["models"]:
        parent = by_sha.get(r.get("parent", "")) if r["precision"] == "int8" else None
        for s in r["speed"]:
            t = speed_at(teacher, s["resolution"], s["threads"])
            ps = speed_at(parent, s["resolution"], s["threads"]) if parent else None
            f = r["fidelity"] or {}
            row = {"name": r["name"], "path": r["path"], "role": r["role"], "precision": r["precision"],
                   "resolution": s["resolution"], "threads": s["threads"],
                   "fps": round(s["fps"], 2), "speedup": round(s["fps"] / t["fps"], 2) if t else "",
                   # an int8 model's speed against its own fp32 parent: below 1 means slower
                   "vs_parent": round(s["fps"] / ps["fps"], 2) if ps else "",
                   "p50_ms": round(s["p50_ms"], 2), "p95_ms": round(s["p95_ms"], 2),
                   "p99_ms": round(s["p99_ms"], 2), "load_s": round(s["load_s"], 3),
                   "peak_rss_mb": round(r["peak_rss_mb"], 1), "size_mb": round(r["size_bytes"] / 1e6, 2)}
            for k in QUALITY:
                row[f"{k}_mean"] = round(f[k]["mean"], 4) if k in f else ""
                row[f"{k}_worst"] = round(f[k]["worst"], 4) if k in f else ""
            look = r.get("style") or {}
            for k in ("style_share", "content_similarity"):
                row[k] = round(look[k]["mean"], 4) if k in look else ""
            st = r["stability"]
            row["noise_ms_ssim"] = round(st["noise_ms_ssim"], 4)
            row["warp_error"] = round(st["warp_error"], 6) if "warp_error" in st else ""
            out.append(row)
    return out


SCIELAB_CAVEAT = ("S-CIELAB caveat: its opponent matrix and spatial filter constants are from "
                  "memory of Zhang & Wandell 1997, not checked against the paper (bench/color.py); "
                  "compare dE00 figures between models of one report, not with published values.")


def _md_table(rep: dict, resolution: str) -> list[str]:
    floor = rep["floor"]
    lines = [f"### {resolution}", "",
             "| model | precision | fps | x teacher | int8 x fp32 parent | p50 ms | p95 ms | MS-SSIM mean / worst "
             "| SSIM mean | PSNR dB | S-CIELAB dE00 mean / worst | style share | content sim. | own noise MS-SSIM "
             "| warp error | RSS MB |",
             "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|"]
    for r in flat_rows(rep):
        if r["resolution"] != resolution:
            continue
        q = (lambda k, w=True: "—" if r[f"{k}_mean"] == "" else
             (f"{r[f'{k}_mean']:.3f} / {r[f'{k}_worst']:.3f}" if w else f"{r[f'{k}_mean']:.3f}"))
        vp = r["vs_parent"]
        vp = "—" if vp == "" else (f"{vp} (slower)" if vp < 1 else str(vp))
        lines.append(f"| {r['name']} | {r['precision']} | {r['fps']:.1f} | {r['speedup']} | {vp} | {r['p50_ms']:.1f} "
                     f"| {r['p95_ms']:.1f} | {q('ms_ssim')} | {q('ssim', False)} | {q('psnr', False)} "
                     f"| {q('delta_e')} | {_num(r['style_share'])} | {_num(r['content_similarity'])} "
                     f"| {r['noise_ms_ssim']:.3f} | {r['warp_error']} | {r['peak_rss_mb']:.0f} |")
    lines += ["", f"Teacher's own noise floor (its output for noisy input, sigma {rep['noise_sigma']}, "
              f"against its clean output): MS-SSIM {floor['ms_ssim']['mean']:.3f}, SSIM "
              f"{floor['ssim']['mean']:.3f}, PSNR {floor['psnr']['mean']:.1f} dB, S-CIELAB dE00 "
              f"{floor['delta_e']['mean']:.2f}. No student can be closer to the teacher than this.", "",
              SCIELAB_CAVEAT, ""]
    return lines


def _num(v) -> str:
    return "—" if v == "" else f"{v:.3f}"


def _style_line(rep: dict) -> str:
    sf = rep.get("style_features") or {}
    if "source" not in sf:
        return f"- style share and content similarity: not measured ({sf.get('unavailable', 'no scorer')})"
    return (f"- style share (Gram distance to the style image `{sf['style']}` at relu1_2..relu4_3, as a share "
            f"of the unstylised photo's; 0 is the style exactly, 1 the photo) and content similarity "
            f"(relu4_3 cosine to the photo), features of the trained loss network `{sf['source'][:28]}...`")


def markdown(rep: dict) -> str:
    m = rep["machine"]
    lines = ["# Limner bench report", "",
             f"- machine: {m['cpu']} ({m['arch']}), {m['cores']} cores, features "
             f"{', '.join(m['features']) or 'none detected'}; {m['os']}",
             f"- onnxruntime {m['onnxruntime']}, Python {m['python']}; measured {m['date']}",
             f"- teacher: `{rep['teacher']}`; held-out images: "
             + ", ".join(f"`{Path(h['path']).name}`" for h in rep["held_out"]),
             f"- quality at {rep['quality_resolution']}, viewing geometry "
             f"{rep['config']['display_width_m']} m wide at {rep['config']['viewing_distance_m']} m "
             f"({rep['pixels_per_degree']:.1f} px/degree); warping error on {rep['clip']}",
             f"- speed: {rep['config']['warmup']} warm-up + {rep['config']['frames']} timed frames, "
             "uint8 in and out, live-runtime session settings, one subprocess per model",
             _style_line(rep), "",
             "![Pareto plot](pareto.png)", "", "![Samples](samples.png)", ""]
    for res in rep["resolutions"]:
        lines += _md_table(rep, res)
    return "\n".join(lines) + "\n"


def _label(img: np.ndarray, text: str) -> np.ndarray:
    img = img.copy()
    cv2.rectangle(img, (0, 0), (img.shape[1], 26), (0, 0, 0), -1)
    cv2.putText(img, text, (6, 19), cv2.FONT_HERSHEY_SIMPLEX, 0.55, (255, 255, 255), 1, cv2.LINE_AA)
    return img


def sample_grid(inp: np.ndarray, samples: dict[str, np.ndarray], rep: dict, cols: int = 3) -> np.ndarray:
    tiles = [_label(cv2.resize(inp, (320, 180), interpolation=cv2.INTER_AREA), "input")]
    by_name = {r["name"]: r for r in rep["models"]}
    for name, img in samples.items():
        r = by_name.get(name) or next(x for x in rep["models"] if x["is_teacher"])
        s = speed_at(r, rep["config"]["plot_resolution"])
        fps = f", {s['fps']:.1f} fps" if s else ""
        tiles.append(_label(cv2.resize(img, (320, 180), interpolation=cv2.INTER_AREA),
                            f"{name} ({r['precision']}{fps})"))
    while len(tiles) % cols:
        tiles.append(np.zeros_like(tiles[0]))
    rows = [np.concatenate(tiles[i:i + cols], 1) for i in range(0, len(tiles), cols)]
    return np.concatenate(rows, 0)


def write_all(rep: dict, out: Path, samples: dict[str, np.ndarray], sample_input: np.ndarray) -> None:
    """Every report file, or none: they are written into a hidden folder inside `out` and
    moved into place only when all are complete (a full disk leaves the previous report, or
    no folder it made)."""
    made = not out.exists()
    out.mkdir(parents=True, exist_ok=True)
    stage = Path(tempfile.mkdtemp(prefix=".report-", dir=out))
    try:
        (stage / "report.json").write_text(json.dumps(rep, indent=1))
        rows = flat_rows(rep)
        with (stage / "report.csv").open("w", newline="") as f:
            w = csv.DictWriter(f, fieldnames=list(rows[0]))
            w.writeheader()
            w.writerows(rows)
        write_image(stage / "samples.png", sample_grid(sample_input, samples, rep))
        pareto_plot(rep, stage / "pareto.png")
        (stage / "report.md").write_text(markdown(rep))
        for f in sorted(stage.iterdir()):
            os.replace(f, out / f.name)
    except OSError as e:
        if e.errno is None:
            raise
        # name the file the user asked for (or the folder), not the hidden one
        where = out / Path(e.filename).name if e.filename and Path(e.filename).parent == stage else out
        raise OSError(e.errno, os.strerror(e.errno), str(where)) from None
    finally:
        shutil.rmtree(stage, ignore_errors=True)
        if made and not any(out.iterdir()):
            out.rmdir()
