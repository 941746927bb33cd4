"""`limner export CHECKPOINT -o FILE.onnx`: a checkpoint -> a self-contained model file."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
import torch
from limner.runtime.metadata import ModelMeta
from limner.runtime.outputs import atomic_write_bytes
from torch import nn

from . import checkpoint as ckptmod
from .onnx_writer import to_onnx


def frame_tensor(bgr: np.ndarray) -> torch.Tensor:
    """(H, W, 3) uint8 BGR -> (1, 3, H, W) float RGB in [0, 1], what the graph's head computes"""
    return torch.from_numpy(np.ascontiguousarray(bgr[:, :, ::-1])).permute(2, 0, 1)[None].float() / 255


def stylise(net: nn.Module, bgr: np.ndarray, **inputs) -> np.ndarray:
    """What the exported model gives for one frame, computed by the torch net (tools and
    reports that score a checkpoint without exporting it); `inputs` go to forward().
    bgr: (H, W, 3) uint8 BGR -> (H, W, 3) uint8 BGR, rounded as the graph's tail rounds"""
    x = frame_tensor(bgr)
    with torch.no_grad():
        y = net(x, **inputs)[0].permute(1, 2, 0).numpy()[:, :, ::-1]     # (H, W, 3) BGR in [0, 1]
    return np.ascontiguousarray(np.floor(y * 255 + 0.5).clip(0, 255).astype(np.uint8))


def save_onnx(model: onnx.ModelProto, out: Path) -> Path:
    out = Path(out)
    data = model.SerializeToString()
    atomic_write_bytes(out, lambda f: f.write(data))
    return out


def export_model(net: nn.Module, meta: ModelMeta, out: Path) -> Path:
    """Write `net` as a contract ONNX file with `meta` in metadata_props."""
    meta.size_multiple = int(getattr(net, "size_multiple", meta.size_multiple))
    return save_onnx(to_onnx(net.eval(), meta.to_props()), out)


def meta_from_checkpoint(ck: ckptmod.Checkpoint, role: str | None = None,
                         parent: str = "", name: str = "") -> ModelMeta:
    m = ck.meta
    return ModelMeta(
        role=role or m.get("role") or ("teacher" if ck.family == "teacher" else "student"),
        precision="fp32", style=str(m.get("style", "")), size_multiple=1,
        loss_network=str(m.get("loss_network", "")), parent=parent or str(m.get("parent", "")),
        name=name or str(m.get("name", "")), arch={"family": ck.family, "model_args": ck.model_args},
        recipe=dict(m.get("recipe", {})), quality=dict(m.get("quality", {})),
        data_sha256=list(m.get("data_sha256", [])))


def export(checkpoint: Path, out: Path, *, name: str = "") -> Path:
    """The `export` subcommand: checkpoint file -> ONNX file (fp32)."""
    ck = ckptmod.load(Path(checkpoint))
    meta = meta_from_checkpoint(ck, name=name or Path(out).stem)
    return export_model(ck.model(), meta, Path(out))
