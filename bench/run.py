"""`limner bench`: every model x resolution x thread count, quality against the teacher."""
from __future__ import annotations

from dataclasses import asdict
from pathlib import Path

import numpy as np
from limner.runtime.errors import InputError
from limner.runtime.hashing import file_sha256
from limner.runtime.images import (
    cover_crop,
    fit_multiple,
    lcm_all,
    list_images,
    parse_resolution,
    read_image,
)
from limner.runtime.model import Model, load_model
from limner.runtime.outputs import check_out_folder
from limner.runtime.progress import Progress
from limner.runtime.viewing import ViewingGeometry

from . import machine, report
from .config import BenchConfig
from .prepare import add_noise
from .quality import compare_sets, stability
from .speed import measure_in_subprocess
from .style_features import open_for_style, score_set

SCHEMA_VERSION = 1


class BenchError(InputError):
    pass


def list_models(specs: list[str]) -> list[Path]:
    out: list[Path] = []
    for s in specs:
        p = Path(s)
        if p.is_dir():
            found = sorted(p.glob("*.onnx"))
            if not found:
                raise BenchError(f"{p}: folder holds no .onnx models")
            out += found
        else:
            out.append(p)
    seen, uniq = set(), []
    for p in out:
        if p.resolve() not in seen:
            seen.add(p.resolve())
            uniq.append(p)
    return uniq


def display_names(models: list[Model]) -> list[str]:
    """Each model's name in the report: its own name, or "folder/name" where two models share
    a name (the same ladder from two runs), so that rows, plot labels and samples stay apart."""
    own = [m.meta.name or m.path.stem for m in models]
    dup = {n for n in own if own.count(n) > 1}
    named = [f"{m.path.parent.name}/{n}" if n in dup else n for m, n in zip(models, own)]
    for i, n in enumerate(named):  # same folder name too: the path's index keeps them apart
        if named.count(n) > 1:
            named[i] = f"{n}#{i}"
    return named


def check_overlap(models: list[Model], held_out: list[Path]) -> dict[str, str]:
    """Refuse held-out images that a model was trained, distilled or calibrated on."""
    hashes = {file_sha256(p): p for p in held_out}
    for m in models:
        seen = set(m.meta.data_sha256) | set(m.meta.calibration.get("data_sha256", []))
        clash = [str(hashes[h]) for h in hashes if h in seen]
        if clash:
            raise BenchError(f"held-out image {clash[0]} was among the images {m.path} saw in "
                             f"training, distillation or calibration; choose images it never saw")
    return {str(p): h for h, p in hashes.items()}


def _clip_frames(clip: str | None, n: int, w: int, h: int) -> tuple[list[np.ndarray], str]:
    from limner.runtime.demo_clip import DemoClip
    from limner.runtime.sources import open_source

    src = open_source(clip) if clip else DemoClip(loop=False)
    frames = []
    try:
        while len(frames) < n:
            ok, f = src.read()
            if not ok or f is None:
                break
            frames.append(cover_crop(f, w, h))
    finally:
        src.release()
    if len(frames) < 2:
        raise BenchError(f"{clip}: fewer than two frames could be read for the warping error")
    return frames, (clip or "bundled demo clip")


def _rel(path: str | Path, out: Path) -> str:
    import os

    return os.path.relpath(Path(path).resolve(), Path(out).resolve())


def _run_all(model: Model, frames: list[np.ndarray]) -> list[np.ndarray]:
    return [model.run(f) for f in frames]


def bench(models: list[str], teacher: str, content: list[str], out: Path,
          cfg: BenchConfig, clip: str | None = None, style: str | None = None) -> dict:
    """`style`: the style image (bundled name or path) for the style scores; default: the
    teacher's style name when it is a bundled style."""
    out = Path(out)
    check_out_folder(out)
    paths = list_models(models)
    teacher_path = Path(teacher)
    paths = [p for p in paths if p.resolve() != teacher_path.resolve()]
    loaded = [load_model(teacher_path)] + [load_model(p) for p in paths]
    held_out = list_images(content)
    held_hashes = check_overlap(loaded, held_out)
    mult = lcm_all([m.size_multiple for m in loaded])
    sizes = [fit_multiple(*parse_resolution(r), mult) for r in cfg.resolutions]
    qw, qh = fit_multiple(*parse_resolution(cfg.quality_resolution), mult)
    geometry = ViewingGeometry(cfg.display_width_m, cfg.viewing_distance_m)
    ppd = geometry.pixels_per_degree(qw)

    images = [cover_crop(read_image(p), qw, qh) for p in held_out]
    noisy = [add_noise(im, cfg.noise_sigma, cfg.noise_seed + i) for i, im in enumerate(images)]
    clip_in, clip_name = _clip_frames(clip, cfg.clip_frames, qw, qh)
    scorer, no_style = open_for_style(style or loaded[0].meta.style)
    photo_feats = [scorer.features(im) for im in images] if scorer else []

    steps = len(loaded) * 2
    bar = Progress(steps, "bench")
    teacher_m = loaded[0]
    t_clean = _run_all(teacher_m, images)
    rows = []
    floor = None
    for m, name in zip(loaded, display_names(loaded)):
        bar.update(0, f"{m.path.name}: quality")
        clean = t_clean if m is teacher_m else _run_all(m, images)
        noisy_out = _run_all(m, noisy)
        clip_out = _run_all(m, clip_in)
        if m is teacher_m:
            floor = compare_sets(noisy_out, t_clean, ppd)
        fidelity = None if m is teacher_m else compare_sets(clean, t_clean, ppd)
        stab = stability(clean, noisy_out, clip_in, clip_out)
        look = score_set(scorer, clean, images, photo_feats) if scorer else None
        bar.update(1, f"{m.path.name}: speed")
        speed = measure_in_subprocess(str(m.path), [str(p) for p in held_out], sizes, cfg.threads,
                                      cfg.warmup, cfg.frames)
        bar.update(1, f"{m.path.name}: done")
        rows.append({"path": str(m.path), "name": name, "role": m.meta.role,
                     "precision": m.meta.precision, "style_name": m.meta.style, "parent": m.meta.parent,
                     "sha256": m.sha256(), "size_bytes": m.path.stat().st_size,
                     "size_multiple": m.size_multiple, "arch": m.meta.arch,
                     "calibration": m.meta.calibration, "is_teacher": m is teacher_m,
                     "peak_rss_mb": speed["peak_rss_mb"], "speed": speed["results"],
                     "fidelity": fidelity, "stability": stab, "style": look})
        if m is teacher_m:
            samples = {"teacher": clean[cfg.sample_image % len(clean)]}
        else:
            samples[name] = clean[cfg.sample_image % len(clean)]
    bar.close()
    for r in rows:  # paths relative to the report folder: the report can move with its models
        r["path"] = _rel(r["path"], out)
    rep = {"schema": SCHEMA_VERSION, "machine": machine.describe(),
           "config": asdict(cfg), "teacher": _rel(teacher_path, out),
           "held_out": [{"path": _rel(p, out), "sha256": h} for p, h in held_hashes.items()],
           "clip": _rel(clip, out) if clip else clip_name, "quality_resolution": f"{qw}x{qh}",
           "resolutions": [f"{w}x{h}" for w, h in sizes], "pixels_per_degree": ppd,
           "noise_sigma": cfg.noise_sigma, "floor": floor, "models": rows,
           "style_features": {"source": scorer.source, "style": style or loaded[0].meta.style}
           if scorer else {"unavailable": no_style}}
    report.write_all(rep, out, samples, images[cfg.sample_image % len(images)])
    return rep


