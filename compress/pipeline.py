"""`limner compress`: a teacher -> a ladder of fp32 and int8 ONNX candidates + manifest.json.

Resumable: finished candidates are skipped on a rerun; an unfinished student resumes
from its checkpoint under OUT/work/.
"""
from __future__ import annotations

import hashlib
import json
import time
from dataclasses import asdict, replace
from pathlib import Path
from typing import Callable

import numpy as np
import torch
from limner.runtime import config as cfgmod
from limner.runtime.hashing import file_sha256
from limner.runtime.metadata import ModelMeta
from limner.runtime.model import load_model
from limner.runtime.outputs import atomic_write_bytes, check_out_folder

from . import checkpoint as ckptmod
from .content import ContentItem, ContentSet, load_content
from .distill import build_cache, distill
from .distributed import World, device_for, init, train_device
from .errors import CompressError
from .export import export, export_model
from .lossnet import build_loss_net
from .macs import count_macs, count_params
from .prune import conv_weight_count, prune
from .recipe import LossWeights, PruneSpec, Recipe, StudentSpec
from .registry import build
from .warm_start import init_from


def split_by_source(data: ContentSet, recipe: Recipe) -> dict[str, ContentSet]:
    """Deterministic split by source file (a video's frames stay together)."""
    by_src: dict[str, list[ContentItem]] = {}
    for it in data.items:
        by_src.setdefault(it.sha256, []).append(it)
    keys = sorted(by_src, key=lambda h: hashlib.sha256(f"{recipe.seed}:{h}".encode()).hexdigest())
    n = len(keys)
    n_cal = max(1, round(n * recipe.calibration_fraction)) if n >= 3 else 0
    n_held = round(n * recipe.held_out_fraction) if n >= 3 else 0
    if n - n_cal - n_held < 1:
        raise CompressError(f"content has {n} source(s): too few to split into distillation, "
                            "calibration and held-out sets")
    parts = {"calibration": keys[:n_cal], "held_out": keys[n_cal:n_cal + n_held],
             "distillation": keys[n_cal + n_held:]}
    out = {k: ContentSet([it for h in v for it in by_src[h]], []) for k, v in parts.items()}
    if not out["calibration"].items:  # tiny sets: calibrate on distillation images
        out["calibration"] = out["distillation"]
    return out


class _Log:
    def __init__(self, path: Path, enabled: bool = True) -> None:
        self.path, self.enabled = path, enabled

    def __call__(self, msg: str) -> None:
        if not self.enabled:  # ranks other than 0 under torchrun
            return
        print(msg, flush=True)
        with self.path.open("a") as f:
            f.write(time.strftime("%Y-%m-%d %H:%M:%S ") + msg + "\n")


def _write_json(path: Path, obj: dict) -> None:
    data = json.dumps(obj, indent=1).encode()
    atomic_write_bytes(path, lambda f: f.write(data))


def _calibration_frames(data: ContentSet, n: int, side: int, mult: int, seed: int) -> list[np.ndarray]:
    from limner.runtime.images import cover_crop

    side = side - side % mult
    rng = np.random.default_rng([seed, 31337])
    idx = rng.permutation(len(data.items))
    frames = []
    for k in range(n):
        img = data.items[int(idx[k % len(idx)])].image
        h, w = img.shape[:2]
        s = int(min(h, w) * rng.uniform(0.6, 1.0))
        y, x = int(rng.integers(0, h - s + 1)), int(rng.integers(0, w - s + 1))
        frames.append(cover_crop(img[y:y + s, x:x + s], side, side))
    return frames


def _int8_probe(types: str, log: Callable[[str], None]) -> dict:
    """A short fp32-against-int8 conv timing on this CPU (bench/int8_probe.py): says up front
    when int8 candidates cannot be expected to run faster than their parents here."""
    from limner.bench.int8_probe import ProbeSpec, probe

    r = probe(ProbeSpec(channels=32, rounds=3, runs=3, types=types))
    log(r.summary())
    if r.verdict():
        log(f"  {r.verdict()} (they may be faster on the target device: run `limner int8-probe` there)")
    return {"types": r.types, "fp32_ms": r.fp32_ms, "int8_ms": r.int8_ms, "ratio": r.ratio,
            "spec": asdict(r.spec)}


def compress(teacher: str, content: list[str], recipe: Recipe, out: Path,
             calibration: list[str] | None = None, world: World | None = None) -> dict:
    """`calibration`: content kept for int8 calibration only; when given, `content` is all
    distillation (no fractions are split off it). Under torchrun every rank distills its
    share of each batch; rank 0 alone writes (teacher export, cache, models, manifest, log)
    and quantizes, and the others wait for it where they read what it wrote."""
    check_out_folder(Path(out))
    tpath = _check_teacher(Path(teacher), recipe)  # inputs first: a bad one leaves no OUT
    world = world or init(recipe.device)
    data, splits = _content_splits(content, calibration, recipe)
    run = _Run.start(tpath, data, splits, recipe, Path(out), world)
    for spec in recipe.student:
        run.student(spec)
    for spec in recipe.prune:
        run.pruned(spec)
    if recipe.int8.enabled and world.main:  # quantization is one process's work
        run.quantize_all()
    run.log(f"done: {len(run.manifest['candidates'])} candidate(s) in {run.out}; manifest {run.manifest_path}")
    return run.manifest


def _check_teacher(tpath: Path, recipe: Recipe) -> Path:
    if tpath.suffix not in (".pt", ".onnx"):
        raise CompressError(f"{tpath}: expected a Limner checkpoint (.pt) or model (.onnx)")
    if tpath.suffix != ".pt" and any(p.parent == "teacher" for p in recipe.prune):
        raise CompressError(f"{tpath}: pruning the teacher needs its checkpoint (.pt), not an ONNX "
                            "file; distillation alone works from ONNX")
    if tpath.suffix == ".pt":
        family = ckptmod.load(tpath).family
        if family != "teacher":
            raise CompressError(f"{tpath}: holds a {family}, expected a teacher")
    elif (role := load_model(tpath).meta.role) != "teacher":
        raise CompressError(f"{tpath}: role is {role!r}, expected a teacher")
    return tpath


def _content_splits(content: list[str], calibration: list[str] | None,
                    recipe: Recipe) -> tuple[ContentSet, dict[str, ContentSet]]:
    data = load_content(content, min_items=1 if calibration else 3, min_side=recipe.min_content_side())
    if not calibration:
        return data, split_by_source(data, recipe)
    calib = load_content(calibration, min_items=1, min_side=recipe.crop)
    shared = set(calib.hashes()) & set(data.hashes())
    if shared:
        raise CompressError(f"{len(shared)} calibration file(s) are also in --content; keep them apart")
    return data, {"distillation": data, "calibration": calib, "held_out": ContentSet([], [])}


class _Run:
    """One compress run: where it writes, what it has made (the manifest), and the shared
    inputs of every candidate (teacher, cached targets, loss network)."""

    def __init__(self, **kw) -> None:
        self.__dict__.update(kw)

    @classmethod
    def start(cls, tpath: Path, data: ContentSet, splits: dict[str, ContentSet], recipe: Recipe,
              out: Path, world: World) -> "_Run":
        main = world.main
        device = device_for(world, train_device(recipe.device))
        log = _Log(out / "compress.log", main)
        if recipe.threads:
            torch.set_num_threads(recipe.threads)
        teacher_onnx = out / "work" / "teacher.onnx" if tpath.suffix == ".pt" else tpath
        if main:
            out.mkdir(parents=True, exist_ok=True)
            (out / "work").mkdir(exist_ok=True)
            (out / "recipe.toml").write_text(cfgmod.dumps_toml(recipe) + f"# world size: {world.size}\n")
            if tpath.suffix == ".pt":  # a checkpoint is exported first; an ONNX file is used as it is
                export(tpath, teacher_onnx, name="teacher")
        world.barrier()
        manifest_path = out / "manifest.json"
        manifest = json.loads(manifest_path.read_text()) if manifest_path.exists() else {"candidates": {}}
        tmodel = load_model(teacher_onnx)
        teacher_sha = file_sha256(teacher_onnx)
        manifest["teacher"] = {"path": str(tpath), "sha256": teacher_sha, "style": tmodel.meta.style}
        manifest["splits"] = {k: {"sources": v.sources(), "sha256": v.hashes()} for k, v in splits.items()}
        if data.skipped:
            log(f"skipped {len(data.skipped)} unreadable or too small content file(s)")
        lossnet, source = build_loss_net(recipe.loss_net, Path(recipe.loss_weights) if recipe.loss_weights
                                         else None, recipe.loss_seed)
        cache_path = out / "work" / "cache.npz"
        if main:  # the teacher's outputs are computed once, by rank 0; the others read its file
            cache = build_cache(tmodel, splits["distillation"], recipe, cache_path, teacher_sha)
            _write_json(manifest_path, manifest)
        world.barrier()
        if not main:
            cache = build_cache(tmodel, splits["distillation"], recipe, cache_path, teacher_sha)
        return cls(out=out, recipe=recipe, world=world, device=device, log=log, tpath=tpath,
                   teacher_onnx=teacher_onnx, tmodel=tmodel, teacher_sha=teacher_sha, splits=splits,
                   seen=sorted(set(splits["distillation"].hashes()) | set(tmodel.meta.data_sha256)),
                   lossnet=lossnet, source=source, cache=cache, manifest=manifest,
                   manifest_path=manifest_path)

    def base_meta(self, name: str, role: str, parent: str, entry: dict, loss: LossWeights) -> ModelMeta:
        return ModelMeta(role=role, precision="fp32", style=self.tmodel.meta.style, size_multiple=1,
                         loss_network=self.tmodel.meta.loss_network, parent=parent, name=name,
                         recipe={"entry": entry, "distill_loss": asdict(loss),
                                 "distill_loss_network": self.source.describe()},
                         data_sha256=self.seen)

    def done(self, name: str) -> bool:
        c = self.manifest["candidates"].get(name)
        return bool(c) and (self.out / c["file"]).exists() and file_sha256(self.out / c["file"]) == c["sha256"]

    def skip(self, name: str) -> bool:
        """True (and says so) when a rerun finds the candidate finished."""
        if self.done(name):
            self.log(f"{name}: done earlier, skipped")
            return True
        return False

    def record(self, name: str, path: Path, net: torch.nn.Module, entry: dict, info: dict) -> None:
        self.manifest["candidates"][name] = {
            "file": path.name, "role": entry["role"], "precision": "fp32", "parent": entry["parent"],
            "parent_name": entry.get("parent_name", "teacher"), "knobs": net.model_args.get("knobs", {}),
            "model_args": net.model_args, "parameters": count_params(net),
            "conv_weights": conv_weight_count(net), "macs_640x360": count_macs(net, 360, 640),
            "file_bytes": path.stat().st_size, "sha256": file_sha256(path), **info}
        _write_json(self.manifest_path, self.manifest)

    def distill_and_finish(self, name: str, role: str, parent: str, entry: dict, net: torch.nn.Module,
                           steps: int, lr: float, loss: LossWeights, work: Path, desc: str,
                           extra: dict) -> torch.nn.Module:
        """Distill; rank 0 exports and records the candidate; then every rank reads the manifest."""
        t0 = time.monotonic()
        r = replace(self.recipe, loss=loss)
        net, info = distill(net, self.cache, r, steps, lr, self.lossnet, work, desc, {"name": name},
                            self.device, self.world)
        if self.world.main:
            path = export_model(net, self.base_meta(name, role, parent, entry, loss), self.out / f"{name}.onnx")
            self.record(name, path, net, entry, {"distill": info, **extra, "wall_s": time.monotonic() - t0})
        self.world.barrier()
        self.manifest = json.loads(self.manifest_path.read_text())
        return net

    def student(self, spec: StudentSpec) -> None:
        if self.skip(spec.name):
            return
        entry = {**asdict(spec), "role": "student", "parent": self.teacher_sha}
        net = build(spec.family, **spec.knobs)
        if spec.init:
            net = init_from(spec.init, net, spec.name)
            entry["init_sha256"] = file_sha256(Path(spec.init))
        net = self.distill_and_finish(spec.name, "student", self.teacher_sha, entry, net, spec.steps, spec.lr,
                                      spec.losses(self.recipe.loss), self.out / "work" / spec.name,
                                      f"distill {spec.name}", {})
        c = self.manifest["candidates"][spec.name]
        self.log(f"{spec.name}: {count_params(net):,} parameters, {count_macs(net, 360, 640) / 1e9:.2f} GMACs "
                 f"at 640x360, {c['distill']['steps']} steps in {c['distill']['seconds'] / 60:.1f} min")

    def pruned(self, spec: PruneSpec) -> None:
        if self.skip(spec.name):
            return
        if spec.parent == "teacher":
            parent = {"sha256": self.teacher_sha, "file_bytes": self.teacher_onnx.stat().st_size}
            pnet = ckptmod.load(self.tpath).model()
        else:
            parent = self.manifest["candidates"][spec.parent]
            pnet = ckptmod.load(self.out / "work" / spec.parent / "checkpoint.pt").model()
        work = self.out / "work" / spec.name
        net = ckptmod.load(work / "checkpoint.pt").model() if (work / "checkpoint.pt").exists() \
            else prune(pnet, spec.ratio)
        before = {"parameters": count_params(pnet), "conv_weights": conv_weight_count(pnet),
                  "macs_640x360": count_macs(pnet, 360, 640), "file_bytes": parent["file_bytes"]}
        entry = {**asdict(spec), "role": "pruned", "parent": parent["sha256"], "parent_name": spec.parent}
        self.distill_and_finish(spec.name, "pruned", parent["sha256"], entry, net, spec.steps, spec.lr,
                                spec.losses(self.recipe.loss), work, f"recover {spec.name}",
                                {"before_pruning": before})
        c = self.manifest["candidates"][spec.name]
        self.log(f"{spec.name}: pruned {spec.parent} by {1 - c['conv_weights'] / before['conv_weights']:.1%} of "
                 f"conv weights (target {spec.ratio:.0%}); parameters {before['parameters']:,} -> "
                 f"{c['parameters']:,}, GMACs {before['macs_640x360'] / 1e9:.2f} -> {c['macs_640x360'] / 1e9:.2f}, "
                 f"file {before['file_bytes'] / 1e6:.2f} -> {c['file_bytes'] / 1e6:.2f} MB")

    def quantize_all(self) -> None:
        spec = self.recipe.int8
        fp32 = [n for n, c in self.manifest["candidates"].items() if c["precision"] == "fp32"]
        targets = spec.models or fp32
        if not all(self.done(f"{n}-int8") for n in targets):
            self.manifest["int8_probe"] = _int8_probe(spec.types, self.log)
        for name in targets:
            if not self.skip(f"{name}-int8"):
                self.quantize_one(name)

    def quantize_one(self, name: str) -> None:
        from limner.bench.int8 import quantize, with_props

        t0 = time.monotonic()
        spec, calib_set, qname = self.recipe.int8, self.splits["calibration"], f"{name}-int8"
        c = self.manifest["candidates"][name]
        fpath = self.out / c["file"]
        m = load_model(fpath)
        calib = _calibration_frames(calib_set, spec.calibration_frames, spec.calibration_size,
                                    m.size_multiple, self.recipe.seed)
        check = _calibration_frames(calib_set, 4, 320, m.size_multiple, self.recipe.seed + 1)
        props = dict(m.session.get_modelmeta().custom_metadata_map)
        qpath = self.out / f"{qname}.onnx"
        info = quantize(fpath, qpath, calib, check, spec, with_props(props, precision="int8", parent=c["sha256"],
                                                                     name=qname), calib_set.hashes(), self.log)
        self.manifest["candidates"][qname] = {
            "file": qpath.name, "role": c["role"], "precision": "int8", "parent": c["sha256"],
            "parent_name": name, "knobs": c["knobs"], "model_args": c["model_args"],
            "parameters": c["parameters"], "conv_weights": c["conv_weights"],
            "macs_640x360": c["macs_640x360"], "file_bytes": qpath.stat().st_size,
            "sha256": file_sha256(qpath), "calibration": info, "wall_s": time.monotonic() - t0}
        _write_json(self.manifest_path, self.manifest)
