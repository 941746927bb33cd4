"""Distillation of a teacher into a student (Hinton et al. 2015, applied to
image-to-image: the student learns to reproduce the teacher's output).

Pixel terms alone leave students dark and desaturated (measured: MS-SSIM 0.63 after
1,500 steps of L1), so the loss mixes structure (L1, MS-SSIM), texture (loss-network
features and Gram matrices of both outputs), colour statistics, and a noise term:
the student's output for a frame with camera-like noise is pulled towards the
teacher's output for the clean frame, so students can be steadier than their teacher.
"""
from __future__ import annotations

import hashlib
import math
import time
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F
from limner.runtime.model import Model
from limner.runtime.outputs import atomic_write_bytes
from limner.runtime.progress import Progress
from torch import nn

from . import checkpoint as ckptmod
from . import frame_norm
from .content import ContentSet, sample_batch, sample_frame
from .distributed import World
from .errors import CompressError
from .losses import gram
from .lossnet import STYLE_LAYERS
from .recipe import LossWeights, Recipe
from .ssim_loss import ms_ssim


def cache_key(recipe: Recipe, data: ContentSet, teacher_sha: str) -> str:
    """What a teacher-target cache was built from: sampling settings, teacher, content."""
    inputs = hashlib.sha256(",".join([teacher_sha, *data.hashes()]).encode()).hexdigest()[:16]
    variety = recipe.variety.describe()
    return (f"v4:{recipe.target_frame or 'crop'}:{recipe.crops_per_frame}:{recipe.seed}:"
            f"{'camera' if recipe.camera_augment else 'plain'}:{inputs}" + (f":{variety}" if variety else ""))


def build_cache(teacher: Model, data: ContentSet, recipe: Recipe, path: Path,
                teacher_sha: str) -> dict[str, np.ndarray]:
    """Random crops of the distillation set and the teacher's outputs, computed once.

    With `recipe.target_frame` set (the default), the teacher styles whole camera-sized
    frames and the crops are cut from input and output at the same place: the teacher's
    instance normalisation sees the whole frame, so its output for a region depends on
    the rest of the frame (measured: the bundled teacher run on 128 px tiles of a 640x360
    photo against the same tiles of its full-frame output, MS-SSIM 0.68 / 0.58), and the
    students are judged on whole frames. Crop offsets are multiples of 8 (the students'
    total stride), so the texture's phase on the pixel grid matches what a student sees.
    Without it, the teacher styles each crop alone (earlier behaviour).
    A cache file at `path` is reused only when it was built with the same sampling settings,
    the same teacher (`teacher_sha`, the SHA-256 of its model file) and the same content.
    """
    path = Path(path)
    n, c = recipe.cache_crops, recipe.crop
    key = cache_key(recipe, data, teacher_sha)
    if path.exists():
        z = dict(np.load(path))
        if z["inputs"].shape[0] == n and z["inputs"].shape[1] == c and str(z.get("key", "")) == key:
            return z
    z = {"inputs": np.empty((n, c, c, 3), np.uint8), "key": np.array(key)}
    z["targets"] = np.empty_like(z["inputs"])
    if recipe.target_frame:
        w, h = recipe.frame_size()
        per = recipe.crops_per_frame
        nf = (n + per - 1) // per
        z["frames"] = np.empty((nf, h, w, 3), np.uint8)             # RGB
        z["frame_index"] = np.arange(n, dtype=np.int32) // per
        bar = Progress(nf, f"teacher targets ({w}x{h} frames)")
        for f, (frame, offsets) in enumerate(_frames(data, recipe, nf, w, h)):
            out = teacher.run(frame)
            z["frames"][f] = frame[:, :, ::-1]
            for i, (y, x) in zip(range(f * per, min(n, (f + 1) * per)), offsets):
                z["inputs"][i] = frame[y:y + c, x:x + c, ::-1]       # -> RGB
                z["targets"][i] = out[y:y + c, x:x + c, ::-1]
            bar.update(1)
    else:
        bar = Progress(n, "teacher targets")
        for i in range(n):
            rgb = sample_batch(data, np.random.default_rng([recipe.seed, 7919, i]), 1, c)[0]
            z["inputs"][i] = rgb
            z["targets"][i] = teacher.run(np.ascontiguousarray(rgb[:, :, ::-1]))[:, :, ::-1]
            bar.update(1)
    bar.close()
    _save(path, z)
    return z


def _frames(data: ContentSet, recipe: Recipe, count: int, w: int, h: int):
    """Deterministic frames (BGR) and, for each, its crop offsets on the 8-pixel grid."""
    c, per = recipe.crop, recipe.crops_per_frame
    for f in range(count):
        rng = np.random.default_rng([recipe.seed, 7919, f])
        frame = sample_frame(data, rng, w, h, recipe.camera_augment, recipe.variety)  # (h, w, 3) BGR
        offsets = [(8 * int(rng.integers(0, (h - c) // 8 + 1)), 8 * int(rng.integers(0, (w - c) // 8 + 1)))
                   for _ in range(per)]
        yield frame, offsets


def _save(path: Path, z: dict[str, np.ndarray]) -> None:
    def write(f):
        np.savez(f, **z)
    atomic_write_bytes(path, write)


def _t(batch: np.ndarray) -> torch.Tensor:
    # (B, H, W, 3) uint8 RGB -> (B, 3, H, W) float in [0, 1]
    return torch.from_numpy(np.ascontiguousarray(batch)).permute(0, 3, 1, 2).float() / 255.0


class DistillLoss:
    """Every term is a mean over the batch (this rank's share under torchrun); the start
    values are averaged over the ranks, so the ranks' mean loss is the whole batch's."""

    def __init__(self, weights: LossWeights, lossnet: nn.Module, world: World = World()) -> None:
        self.w, self.net, self.world = weights, lossnet, world
        self.scale: dict[str, float] = {}

    def terms(self, student: nn.Module, x: torch.Tensor, t: torch.Tensor,
              noise: torch.Tensor, frame: torch.Tensor | None = None) -> dict[str, torch.Tensor]:
        # x: input, t: teacher output, noise: same shape; all (B, 3, H, W) in [0, 1]
        # frame: (B, 3, Hf, Wf) the whole frames x was cut from (students with frame context)
        w = self.w
        base = getattr(student, "module", student)  # the net itself under DDP
        stats = base.frame_stats(frame) if frame is not None else None  # once per batch
        def run(inp: torch.Tensor) -> torch.Tensor:
            return student(inp) if stats is None else student(inp, stats=stats)
        y = run(x)
        out: dict[str, torch.Tensor] = {}
        if w.pixel_l1:
            out["pixel_l1"] = (y - t).abs().mean()
        if w.lowpass_l1:
            out["lowpass_l1"] = (F.avg_pool2d(y, 4) - F.avg_pool2d(t, 4)).abs().mean()
        if w.ms_ssim:
            out["ms_ssim"] = 1.0 - ms_ssim(y, t)
        if w.color_stats:
            out["color_stats"] = ((y.mean((2, 3)) - t.mean((2, 3))).abs().mean()
                                  + (y.std((2, 3)) - t.std((2, 3))).abs().mean())
        if w.feature or w.gram:
            used = set(w.feature_layers if w.feature else []) | set(w.gram_layers if w.gram else [])
            upto = max(used, key=STYLE_LAYERS.index)
            fy = self.net(y, upto=upto)
            with torch.no_grad():
                ft = self.net(t, upto=upto)
            if w.feature:
                out["feature"] = sum(F.mse_loss(fy[k], ft[k]) for k in w.feature_layers)
            if w.gram:
                out["gram"] = sum(((gram(fy[k]) - gram(ft[k])) ** 2).sum((1, 2)).mean() for k in w.gram_layers)
        if w.noise_consistency:
            yn = run((x + noise).clamp(0, 1))
            out["noise_consistency"] = (yn - t).abs().mean()
        return out

    def total(self, terms: dict[str, torch.Tensor]) -> tuple[torch.Tensor, dict[str, float]]:
        new = {k: float(v.detach()) for k, v in terms.items() if k not in self.scale}
        for k, v in self.world.mean(new).items():  # first batch (or a term added to a resumed run)
            self.scale[k] = v if self.w.normalize and v > 0 else 1.0
        total = sum(getattr(self.w, k) * v / self.scale[k] for k, v in terms.items())
        return total, {k: float(v.detach()) for k, v in terms.items()} | {"total": float(total.detach())}


def distill(net: nn.Module, cache: dict[str, np.ndarray], recipe: Recipe, steps: int, lr: float,
            lossnet: nn.Module, workdir: Path, desc: str, meta: dict,
            device: torch.device = torch.device("cpu"), world: World = World()) -> tuple[nn.Module, dict]:
    """Train `net` on the cached pairs on `device`; resumable from workdir/checkpoint.pt.
    Under torchrun each rank takes its share of every batch and rank 0 writes the
    checkpoints. Returns the trained net on the CPU (export reads its weights there)."""
    workdir = Path(workdir)
    ckpt_path = workdir / "checkpoint.pt"
    loss = DistillLoss(recipe.loss, lossnet.to(device), world)
    net = net.to(device)
    opt = torch.optim.Adam(net.parameters(), lr=lr)
    step, seconds_before = 0, 0.0
    if ckpt_path.exists():
        ck = ckptmod.load(ckpt_path)
        net = ck.model().train().to(device)
        opt = torch.optim.Adam(net.parameters(), lr=lr)
        opt.load_state_dict(ck.train_state["optimizer"])  # moves its state to the params' device
        loss.scale = dict(ck.train_state["loss_scale"])
        step = int(ck.train_state["step"])
        seconds_before = float(ck.train_state.get("seconds", 0.0))
        print(f"{desc}: resuming at step {step}", flush=True)
    def lr_at(k: int) -> float:  # cosine decay to 5% (common practice, no source); resumable
        return lr * (0.05 + 0.95 * 0.5 * (1 + math.cos(math.pi * min(k, steps) / steps)))
    n = cache["inputs"].shape[0]
    model = world.wrap(net, device)  # DDP averages the ranks' gradients
    share = world.share(recipe.batch)
    bar = Progress(steps, desc, start=step) if world.main else None
    t0 = time.monotonic()
    logs: dict[str, float] = {}

    def save(s: int) -> None:
        if not world.main:
            return
        ckptmod.save(ckptmod.from_model(net, meta, {
            "step": s, "optimizer": opt.state_dict(), "loss_scale": dict(loss.scale),
            "seconds": seconds_before + time.monotonic() - t0, "last": dict(logs)}), ckpt_path)

    with_frames = bool(getattr(net, "context_points", None)) and "frames" in cache
    # instance-normalised nets (a pruned teacher) normalise crops with their frame's statistics;
    # a batch then holds crops of one frame, so one whole frame runs per step
    norm_frames = frame_norm.has_norms(net) and "frames" in cache
    per = int(np.bincount(cache["frame_index"]).min()) if norm_frames else 0
    net.train()
    try:
        while step < steps:
            rng = np.random.default_rng([recipe.seed, 104729, step])
            if norm_frames:
                f = int(rng.integers(0, int(cache["frame_index"].max()) + 1))
                idx = np.flatnonzero(cache["frame_index"] == f)[rng.integers(0, per, recipe.batch)]
            else:
                idx = rng.integers(0, n, recipe.batch)
            c = cache["inputs"].shape[1]  # the whole batch's noise, as one process draws it
            noise = rng.normal(0, recipe.loss.noise_sigma / 255.0, (recipe.batch, 3, c, c)).astype(np.float32)
            idx, noise = idx[share], torch.from_numpy(noise[share])
            x, t = _t(cache["inputs"][idx]), _t(cache["targets"][idx])
            x, t, noise = x.to(device), t.to(device), noise.to(device)
            frame = _t(cache["frames"][cache["frame_index"][idx]]).to(device) if with_frames else None
            if norm_frames:
                stats = frame_norm.frame_stats(net, _t(cache["frames"][f:f + 1]).to(device))
                with frame_norm.use(net, stats):
                    total, logs = loss.total(loss.terms(model, x, t, noise))
            else:
                total, logs = loss.total(loss.terms(model, x, t, noise, frame))
            for g in opt.param_groups:
                g["lr"] = lr_at(step)
            opt.zero_grad(set_to_none=True)
            total.backward()
            grad_norm = torch.nn.utils.clip_grad_norm_(net.parameters(), math.inf)
            if not (math.isfinite(logs["total"]) and math.isfinite(float(grad_norm))):
                # stop before the update: the weights and the last checkpoint stay finite
                raise CompressError(f"{desc}: step {step}: the loss or its gradient is not finite "
                                    f"(loss {logs['total']:.4g}, gradient norm {float(grad_norm):.4g}); "
                                    f"the checkpoint at step {step - step % recipe.checkpoint_every} is kept; "
                                    "rerun with a lower lr to resume from it")
            opt.step()
            step += 1
            if bar:
                bar.update(1, " ".join(f"{k} {v:.3g}" for k, v in logs.items() if k in ("total", "pixel_l1", "ms_ssim")))
            if step % recipe.checkpoint_every == 0 or step == steps:
                save(step)
    except KeyboardInterrupt:
        save(step)
        if bar:
            bar.close()
        net.cpu()
        lossnet.cpu()
        raise
    if bar:
        bar.close()
    net.cpu().eval()
    lossnet.cpu()
    return net, {"steps": steps, "seconds": seconds_before + time.monotonic() - t0, "final_loss": logs,
                 "device": str(device)}
