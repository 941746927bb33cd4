"""Teacher training with perceptual losses (Johnson et al. 2016).

Stoppable and resumable: checkpoints every N steps (atomic), `resume=True` continues
from the last one (also after kill -9), Ctrl-C / SIGTERM save before exiting.
Deterministic on CPU for a given seed: batch k is drawn from rng(seed, k).
Under torchrun each rank takes its share of that batch (distributed.py); rank 0 writes.
"""
from __future__ import annotations

import csv
import hashlib
import signal
import time
from dataclasses import dataclass, field, fields
from pathlib import Path

import cv2
import numpy as np
import torch
from limner.runtime import config as cfgmod
from limner.runtime.errors import InputError
from limner.runtime.images import write_image
from limner.runtime.outputs import check_out_folder
from limner.runtime.progress import Progress
from limner.runtime.styles import style_image

from . import checkpoint as ckptmod
from .content import ContentSet, load_content, sample_batch
from .distributed import World, device_for, init, train_device
from .losses import content_loss, gram, style_loss_layer, tv_loss
from .lossnet import CONTENT_LAYER, SOURCES, STYLE_LAYERS, build_loss_net
from .registry import build


@dataclass
class TrainConfig:
    size: int = 160                 # crop side; Johnson et al. used 256 (CPU budgets want less)
    batch: int = 4                  # Johnson et al. 2016
    steps: int = 4000
    lr: float = 1e-3                # Adam, Johnson et al. 2016
    content_weight: float = 1.0     # relative to the normalised start value (see normalize_losses)
    style_weight: float = 5.0       # the strength knob; 5:1 after normalisation, tuned here
    style_layer_weights: list[float] = field(default_factory=lambda: [1.0, 1.0, 1.0, 1.0])
    tv_weight: float = 0.05         # smoothness prior relative to the photo's TV (tuned here)
    normalize_losses: bool = True   # divide each term by its value on the first batch
    loss_net: str = "hed"           # one of lossnet.SOURCES: hed, vgg16-keras, vgg16, random
    loss_weights: str = ""          # weight file for the loss network (default: found by source)
    content_layer: str = CONTENT_LAYER  # feature reconstruction tap (Johnson et al. 2016: relu2_2)
    loss_seed: int = 0              # seed of the random loss network
    style_size: int = 256           # style image side fed to the loss network
    seed: int = 0
    checkpoint_every: int = 100
    preview_every: int = 250
    threads: int = 0                # 0: torch's default
    init: str = ""                  # a teacher checkpoint to start from (e.g. another style's teacher)
    device: str = "cpu"             # cpu, cuda, cuda:N or auto (CUDA when torch sees it)

    def __post_init__(self) -> None:
        if self.size < 32 or self.size % 4:
            raise InputError(f"size={self.size}: must be a multiple of 4, at least 32")
        for k in ("batch", "steps", "checkpoint_every", "preview_every"):
            if getattr(self, k) < 1:
                raise InputError(f"{k}={getattr(self, k)}: must be at least 1")
        if len(self.style_layer_weights) != len(STYLE_LAYERS):
            raise InputError(f"style_layer_weights: need {len(STYLE_LAYERS)} values "
                             f"({', '.join(STYLE_LAYERS)}), got {len(self.style_layer_weights)}")
        if self.loss_net not in SOURCES:
            raise InputError(f"loss_net={self.loss_net!r}: must be one of {', '.join(SOURCES)}")
        if self.content_layer not in STYLE_LAYERS:
            raise InputError(f"content_layer={self.content_layer!r}: must be one of {', '.join(STYLE_LAYERS)}")


class TrainError(InputError):
    pass


class TrainStopped(Exception):
    """Ctrl-C or SIGTERM: the checkpoint is saved; the message says how to continue."""


def to_tensor(batch_rgb: np.ndarray) -> torch.Tensor:
    # (B, H, W, 3) uint8 RGB -> (B, 3, H, W) float in [0, 1]
    return torch.from_numpy(np.ascontiguousarray(batch_rgb)).permute(0, 3, 1, 2).float() / 255.0


class PerceptualLoss:
    """Content + style + TV terms with optional start-value normalisation."""

    def __init__(self, cfg: TrainConfig, lossnet: torch.nn.Module, style_rgb: np.ndarray,
                 world: World = World()) -> None:
        """Under several ranks each term is a mean over this rank's share of the batch; the
        start values and the content TV are averaged over the ranks, so the mean of the
        ranks' losses is the one-process loss of the whole batch."""
        self.cfg, self.net, self.world = cfg, lossnet, world
        s = cv2.resize(style_rgb, (cfg.style_size, cfg.style_size), interpolation=cv2.INTER_AREA)
        device = next(lossnet.parameters()).device
        with torch.no_grad():
            feats = self.net(to_tensor(s[None]).to(device))
        self.style_grams = {k: gram(feats[k]) for k in STYLE_LAYERS}
        self.scale: dict[str, float] = {}

    def terms(self, y: torch.Tensor, x: torch.Tensor) -> dict[str, torch.Tensor]:
        # y: stylised (B, 3, H, W); x: content (B, 3, H, W); both RGB in [0, 1]
        fy = self.net(y)
        with torch.no_grad():
            fx = self.net(x, upto=self.cfg.content_layer)
        # TV relative to the content's own TV: scale-free, so it is not start-normalised
        tv_x = self.world.mean({"tv": float(tv_loss(x))})["tv"]  # the whole batch's content TV
        t = {"content": content_loss(fy[self.cfg.content_layer], fx[self.cfg.content_layer]),
             "tv": tv_loss(y) / max(tv_x, 1e-8)}
        for k in STYLE_LAYERS:
            t[f"style_{k}"] = style_loss_layer(fy[k], self.style_grams[k])
        return t

    def total(self, t: dict[str, torch.Tensor]) -> tuple[torch.Tensor, dict[str, float]]:
        c = self.cfg
        if not self.scale:
            start = self.world.mean({k: float(v.detach()) for k, v in t.items()})
            self.scale = {k: (v if c.normalize_losses and k != "tv" and v > 0 else 1.0)
                          for k, v in start.items()}
        n = {k: v / self.scale[k] for k, v in t.items()}
        wsum = sum(c.style_layer_weights)
        style = sum(w * n[f"style_{k}"] for w, k in zip(c.style_layer_weights, STYLE_LAYERS)) / wsum
        total = c.content_weight * n["content"] + c.style_weight * style + c.tv_weight * n["tv"]
        logs = {"total": float(total.detach()), "content": float(n["content"].detach()),
                "style": float(style.detach()), "tv": float(n["tv"].detach())}
        return total, logs


def _preview(model: torch.nn.Module, images: list[np.ndarray], path: Path,
             device: torch.device = torch.device("cpu"), width: int = 480) -> None:
    """Each whole image at `width` px (input above, output below), side by side."""
    cols = []
    for img in images:
        h, w = img.shape[:2]
        tw, th = width, max(4, round(h * width / w / 4) * 4)
        small = cv2.resize(img, (tw, th), interpolation=cv2.INTER_AREA)
        with torch.no_grad():
            out = model(to_tensor(small[None, :, :, ::-1].copy()).to(device))[0].permute(1, 2, 0).cpu().numpy()
        styled = (out[:, :, ::-1] * 255 + 0.5).clip(0, 255).astype(np.uint8)
        cols.append(np.concatenate([small, styled], 0))
    hgt = max(c.shape[0] for c in cols)
    cols = [np.pad(c, ((0, hgt - c.shape[0]), (0, 0), (0, 0))) for c in cols]
    path.parent.mkdir(parents=True, exist_ok=True)
    write_image(path, np.concatenate(cols, 1))


def _log_rows_upto(csv_path: Path, step: int) -> None:
    """After a crash the log may run past the last checkpoint: keep rows up to `step`."""
    if not csv_path.exists():
        return
    rows = list(csv.reader(csv_path.open()))
    if not rows:
        return
    keep = [rows[0]] + [r for r in rows[1:] if r and int(r[0]) <= step]
    csv_path.write_text("".join(",".join(r) + "\n" for r in keep))


class _Stop(Exception):
    pass


def _on_term(signum, frame):  # SIGTERM behaves like Ctrl-C
    raise _Stop()


def _warm_start(model: torch.nn.Module, path: Path) -> str:
    """Load a teacher checkpoint's weights into `model` (same architecture); returns its sha256."""
    from limner.runtime.hashing import file_sha256

    if not path.is_file():
        raise TrainError(f"init={str(path)!r}: no such checkpoint")
    try:
        ck = ckptmod.load(path)
    except ckptmod.CheckpointError as e:
        raise TrainError(f"init={str(path)!r}: {e}") from None
    if ck.family != "teacher" or ck.model_args != model.model_args:
        raise TrainError(f"init={str(path)!r}: holds a {ck.family} {ck.model_args}, not a teacher "
                         f"like this run's {model.model_args}")
    model.load_state_dict(ck.state_dict)
    return file_sha256(path)


def train(style: str, content: list[str], out: Path, cfg: TrainConfig, *,
          resume: bool = False, preview_content: list[str] | None = None,
          export_onnx: bool = True, world: World | None = None) -> Path:
    """Train a teacher for `style` on `content`; returns the checkpoint path."""
    out = Path(out)
    check_out_folder(out)
    ckpt_path = out / "checkpoint.pt"
    cfg, state = _resolve_resume(cfg, ckpt_path, resume)
    world = world or init(cfg.device)
    device = device_for(world, train_device(cfg.device))
    if cfg.threads:
        torch.set_num_threads(cfg.threads)
    torch.manual_seed(cfg.seed)
    run = _Run.start(style, content, out, cfg, state, preview_content, world, device)
    run.loop()
    if export_onnx and world.main:
        from .export import export
        export(ckpt_path, out / "teacher.onnx")
    world.barrier()
    return ckpt_path


def _resolve_resume(cfg: TrainConfig, ckpt_path: Path, resume: bool) -> tuple[TrainConfig, ckptmod.Checkpoint | None]:
    """A resume keeps the run's settings (steps, threads and device may change)."""
    if not ckpt_path.exists():
        if resume:
            raise TrainError(f"--resume given but {ckpt_path} does not exist")
        return cfg, None
    if not resume:
        raise TrainError(f"{ckpt_path} exists: pass --resume to continue it, or choose another -o")
    state = ckptmod.load(ckpt_path)
    saved = cfgmod.from_dict(TrainConfig, state.meta["config"])
    free = ("steps", "threads", "device")
    for f in fields(TrainConfig):
        if f.name not in free and getattr(cfg, f.name) != getattr(saved, f.name):
            print(f"resume keeps the saved {f.name} = {getattr(saved, f.name)!r} "
                  f"(ignoring {getattr(cfg, f.name)!r})", flush=True)
    for name in free:
        setattr(saved, name, getattr(cfg, name))
    return saved, state


class _Run:
    """One training run's state: data, losses, model, optimizer, log and checkpoints."""

    def __init__(self, **kw) -> None:
        self.__dict__.update(kw)

    @classmethod
    def start(cls, style: str, content: list[str], out: Path, cfg: TrainConfig,
              state: ckptmod.Checkpoint | None, preview_content: list[str] | None,
              world: World, device: torch.device) -> "_Run":
        style_bgr, style_name = style_image(style)
        data: ContentSet = load_content(content, min_items=1, min_side=cfg.size // 2)
        if data.skipped and world.main:
            more = f" and {len(data.skipped) - 3} more" if len(data.skipped) > 3 else ""
            print(f"skipped {len(data.skipped)} content file(s) that are unreadable or smaller than "
                  f"{cfg.size // 2} px: {', '.join(data.skipped[:3])}{more}", flush=True)
        previews = load_content(preview_content).items if preview_content else data.items[:4]
        lossnet, source = build_loss_net(cfg.loss_net, Path(cfg.loss_weights) if cfg.loss_weights else None,
                                         cfg.loss_seed)
        lossnet = lossnet.to(device)
        loss = PerceptualLoss(cfg, lossnet, np.ascontiguousarray(style_bgr[:, :, ::-1]), world)
        model = build("teacher")
        init_sha = _warm_start(model, Path(cfg.init)) if cfg.init and state is None else ""
        start_step, seconds_before = 0, 0.0
        if state is not None:
            model.load_state_dict(state.state_dict)
            loss.scale = dict(state.train_state["loss_scale"])
            start_step = int(state.train_state["step"])
            seconds_before = float(state.train_state.get("seconds", 0.0))
            init_sha = state.meta.get("init_sha256", "")
        model = model.to(device)
        opt = torch.optim.Adam(model.parameters(), lr=cfg.lr)
        if state is not None:
            opt.load_state_dict(state.train_state["optimizer"])
        meta = {"style": style_name, "style_sha256": hashlib.sha256(style_bgr.tobytes()).hexdigest(),
                "loss_network": source.describe(), "data_sha256": data.hashes(),
                "data_sources": data.sources(), "init_sha256": init_sha, "world_size": world.size,
                "config": cfgmod.to_jsonable(cfg)}
        if world.main:
            out.mkdir(parents=True, exist_ok=True)
            (out / "config.toml").write_text(cfgmod.dumps_toml(cfg) + f"# world size: {world.size}\n")
            write_image(out / "style.png", style_bgr)
            if state is not None:
                _log_rows_upto(out / "losses.csv", start_step)
        return cls(cfg=cfg, out=out, world=world, device=device, data=data, previews=previews,
                   loss=loss, model=model, ddp=world.wrap(model, device), opt=opt, meta=meta,
                   step=start_step, seconds_before=seconds_before, t0=time.monotonic())

    def save(self) -> None:
        if not self.world.main:
            return
        ckptmod.save(ckptmod.from_model(self.model, self.meta, {
            "step": self.step, "optimizer": self.opt.state_dict(), "loss_scale": dict(self.loss.scale),
            "seconds": self.seconds_before + time.monotonic() - self.t0, "world_size": self.world.size}),
            self.out / "checkpoint.pt")

    def one_step(self) -> dict[str, float]:
        c = self.cfg
        rng = np.random.default_rng([c.seed, self.step])
        batch = sample_batch(self.data, rng, c.batch, c.size)   # the whole batch, as one process draws it
        x = to_tensor(batch[self.world.share(c.batch)]).to(self.device)
        total, logs = self.loss.total(self.loss.terms(self.ddp(x), x))
        self.opt.zero_grad(set_to_none=True)
        total.backward()                                          # DDP averages the ranks' gradients
        self.opt.step()
        self.step += 1
        return self.world.mean(logs)

    def loop(self) -> None:
        c, main = self.cfg, self.world.main
        log = writer = None
        if main:
            log_new = not (self.out / "losses.csv").exists()
            log = (self.out / "losses.csv").open("a", newline="")
            writer = csv.writer(log)
            if log_new:
                writer.writerow(["step", "total", "content", "style", "tv", "seconds"])
            if self.step:
                print(f"resuming {self.out / 'checkpoint.pt'} at step {self.step}", flush=True)
        bar = Progress(c.steps, "train", start=self.step) if main else None
        old = signal.signal(signal.SIGTERM, _on_term)
        self.model.train()
        try:
            while self.step < c.steps:
                logs = self.one_step()
                if not main:
                    continue
                writer.writerow([self.step] + [f"{logs[k]:.6g}" for k in ("total", "content", "style", "tv")]
                                + [f"{self.seconds_before + time.monotonic() - self.t0:.1f}"])
                bar.update(1, f"loss {logs['total']:.3f} content {logs['content']:.3f} style {logs['style']:.3f}")
                if self.step % c.checkpoint_every == 0 or self.step == c.steps:
                    log.flush()
                    self.save()
                if self.step % c.preview_every == 0 or self.step == c.steps:
                    log.flush()
                    self.model.eval()
                    _preview(self.model, [i.image for i in self.previews],
                             self.out / "previews" / f"step{self.step:06d}.png", self.device)
                    self.model.train()
        except (KeyboardInterrupt, _Stop):
            if log:
                log.flush()
            self.save()
            raise TrainStopped(f"stopped at step {self.step}; checkpoint saved to "
                               f"{self.out / 'checkpoint.pt'} (continue with --resume)") from None
        finally:
            if bar:
                bar.close()
            signal.signal(signal.SIGTERM, old)
            if log:
                log.close()
