"""Checkpoints: model args + weights (+ optional training state), written atomically.

Loaded with torch.load(weights_only=True): a checkpoint cannot run code.
"""
from __future__ import annotations

import io
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import torch
from limner.runtime.errors import InputError
from limner.runtime.outputs import atomic_write_bytes
from torch import nn

from .registry import family_of, rebuild

CHECKPOINT_FORMAT = 1


class CheckpointError(InputError):
    pass


@dataclass
class Checkpoint:
    family: str
    model_args: dict
    state_dict: dict[str, torch.Tensor]
    meta: dict[str, Any] = field(default_factory=dict)  # style, loss network, data hashes, config
    train_state: dict[str, Any] = field(default_factory=dict)  # step, optimizer, rng

    def model(self) -> nn.Module:
        net = rebuild(self.family, self.model_args)
        net.load_state_dict(self.state_dict)
        return net.eval()


def from_model(model: nn.Module, meta: dict | None = None,
               train_state: dict | None = None) -> Checkpoint:
    return Checkpoint(family_of(model), dict(model.model_args),
                      {k: v.detach().clone() for k, v in model.state_dict().items()},
                      dict(meta or {}), dict(train_state or {}))


def weights_only(ckpt: Checkpoint) -> Checkpoint:
    """The checkpoint without optimizer and RNG state: what a bundled model or a warm start
    needs (its step count and time are kept as a record)."""
    keep = {k: v for k, v in ckpt.train_state.items() if k in ("step", "seconds", "world_size")}
    return Checkpoint(ckpt.family, ckpt.model_args, ckpt.state_dict, ckpt.meta, keep)


def save(ckpt: Checkpoint, path: Path) -> None:
    blob = {"limner_checkpoint": CHECKPOINT_FORMAT, "family": ckpt.family,
            "model_args": ckpt.model_args, "state_dict": ckpt.state_dict,
            "meta": ckpt.meta, "train_state": ckpt.train_state}
    buf = io.BytesIO()  # serialised first: a full disk then fails in a plain write, as an OSError
    torch.save(blob, buf)
    data = buf.getvalue()
    atomic_write_bytes(Path(path), lambda f: f.write(data))


def load_failure(e: BaseException) -> str:
    """Why torch.load(weights_only=True) refused a file, without torch's advice to load it
    with weights_only=False (that would run code from the file: Limner never does)."""
    text = str(e).strip()
    if "weights only" in text.lower() or "weights_only" in text:
        return ("it holds Python objects beyond tensors and plain data, which could run code "
                "when loaded; Limner loads weights only")
    first = text.splitlines()[0] if text else type(e).__name__
    return first[:200]


def load(path: Path) -> Checkpoint:
    path = Path(path)
    if not path.is_file():
        raise CheckpointError(f"{path}: no such checkpoint file")
    try:
        blob = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as e:  # truncated, foreign or code-carrying pickles
        raise CheckpointError(f"{path}: not a readable Limner checkpoint ({load_failure(e)})") from None
    if not isinstance(blob, dict) or "limner_checkpoint" not in blob:
        raise CheckpointError(f"{path}: not a Limner checkpoint (no 'limner_checkpoint' key)")
    if blob["limner_checkpoint"] > CHECKPOINT_FORMAT:
        raise CheckpointError(f"{path}: checkpoint format {blob['limner_checkpoint']} is newer "
                              f"than this Limner reads ({CHECKPOINT_FORMAT}); upgrade Limner")
    return Checkpoint(blob["family"], blob["model_args"], blob["state_dict"],
                      blob.get("meta", {}), blob.get("train_state", {}))
