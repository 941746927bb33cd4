"""`limner export CHECKPOINT -o FILE.onnx`: a checkpoint -> a self-contained model file."""
from __future__ import annotations

from pathlib import Path

import onnx
from limner.runtime.metadata import ModelMeta
from limner.runtime.outputs import atomic_write_bytes
from torch import nn

from . import checkpoint as ckptmod
from .onnx_writer import to_onnx


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
