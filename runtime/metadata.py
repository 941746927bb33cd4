"""The model contract's metadata (ONNX metadata_props), shared by export, runtime and bench.

Torch-free and onnx-free: the runtime reads metadata through onnxruntime.
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field

from .errors import InputError

FORMAT_VERSION = 1
PREFIX = "limner."
ROLES = ("teacher", "student", "pruned")
PRECISIONS = ("fp32", "int8")
REQUIRED = ("format", "role", "precision", "style", "parent", "size_multiple", "loss_network")


class MetadataError(InputError):
    pass


@dataclass
class ModelMeta:
    role: str
    precision: str
    style: str
    size_multiple: int
    loss_network: str
    parent: str = ""                  # sha256 of the parent model file; empty for a teacher
    format: int = FORMAT_VERSION
    name: str = ""
    arch: dict = field(default_factory=dict)          # family and model_args
    recipe: dict = field(default_factory=dict)        # compression recipe entry
    quality: dict = field(default_factory=dict)       # measured quality where known
    calibration: dict = field(default_factory=dict)   # int8: method, images, types
    data_sha256: list[str] = field(default_factory=list)  # every image the model saw

    def to_props(self) -> dict[str, str]:
        props = {"format": str(self.format), "role": self.role, "precision": self.precision,
                 "style": self.style, "parent": self.parent,
                 "size_multiple": str(self.size_multiple), "loss_network": self.loss_network,
                 "name": self.name}
        for k in ("arch", "recipe", "quality", "calibration", "data_sha256"):
            props[k] = json.dumps(getattr(self, k), sort_keys=True)
        return {PREFIX + k: v for k, v in props.items()}

    @classmethod
    def from_props(cls, props: dict[str, str]) -> "ModelMeta":
        p = {k[len(PREFIX):]: v for k, v in props.items() if k.startswith(PREFIX)}
        if "format" not in p:
            raise MetadataError("not a Limner model (no limner.format metadata)")
        try:
            fmt = int(p["format"])
        except ValueError:
            raise MetadataError(f"limner.format is {p['format']!r}, not a version number") from None
        if fmt > FORMAT_VERSION:
            raise MetadataError(f"model format {fmt} is newer than this Limner reads "
                                f"({FORMAT_VERSION}); upgrade Limner")
        missing = [k for k in REQUIRED if k not in p]
        if missing:
            raise MetadataError(f"metadata lacks limner.{missing[0]}")
        if p["role"] not in ROLES:
            raise MetadataError(f"limner.role is {p['role']!r}; expected one of {', '.join(ROLES)}")
        if p["precision"] not in PRECISIONS:
            raise MetadataError(f"limner.precision is {p['precision']!r}; "
                                f"expected one of {', '.join(PRECISIONS)}")
        try:
            mult = int(p["size_multiple"])
            if mult < 1:
                raise ValueError
        except ValueError:
            raise MetadataError(f"limner.size_multiple is {p['size_multiple']!r}; "
                                "expected a positive integer") from None
        extra = {}
        for k in ("arch", "recipe", "quality", "calibration", "data_sha256"):
            if k in p and p[k]:
                try:
                    extra[k] = json.loads(p[k])
                except json.JSONDecodeError:
                    raise MetadataError(f"limner.{k} is not valid JSON") from None
        return cls(role=p["role"], precision=p["precision"], style=p["style"],
                   size_multiple=mult, loss_network=p["loss_network"], parent=p["parent"],
                   format=fmt, name=p.get("name", ""), **extra)
