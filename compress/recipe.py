"""The compression recipe (configs/compress/*.toml): the student ladder, pruning,
int8 and the distillation losses."""
from __future__ import annotations

import re
from dataclasses import dataclass, field, fields, replace

from limner.bench.int8 import Int8Spec
from limner.runtime.errors import InputError

from . import registry
from .content import FrameVariety


@dataclass
class LossWeights:
    """Distillation terms (each divided by its value on the first batch when `normalize`)."""
    pixel_l1: float = 1.0          # structure, per pixel
    lowpass_l1: float = 0.0        # L1 of 4x4-averaged outputs: colour and shading without texture phase
    ms_ssim: float = 1.0           # multi-scale structure (1 - MS-SSIM, 3 scales at 160 px crops)
    feature: float = 1.0           # loss-network features of student vs teacher output (relu2_2, relu3_3)
    gram: float = 1.0              # texture: Gram matrices of both outputs (relu1_2 .. relu4_3)
    color_stats: float = 0.5       # per-channel mean and std of both outputs (colour cast, saturation)
    noise_consistency: float = 0.5  # student(x + noise) against student(x): steadier on a live camera
    noise_sigma: float = 2.0       # camera-like noise, grey levels
    normalize: bool = True
    # loss-network taps; the deepest one sets the cost (relu3_3 doubles it over relu2_2)
    feature_layers: list[str] = field(default_factory=lambda: ["relu2_2"])
    gram_layers: list[str] = field(default_factory=lambda: ["relu1_2", "relu2_2"])

    def __post_init__(self) -> None:
        from .lossnet import STYLE_LAYERS
        for k in self.feature_layers + self.gram_layers:
            if k not in STYLE_LAYERS:
                raise InputError(f"loss layer {k!r}: one of {', '.join(STYLE_LAYERS)}")


@dataclass
class StudentSpec:
    name: str
    family: str = "student"        # network family (compress/registry.py)
    knobs: dict = field(default_factory=dict)  # that family's knobs
    steps: int = 2000
    lr: float = 1e-3
    init: str = ""                 # optional student checkpoint (same knobs) to start from
    loss: dict = field(default_factory=dict)  # this student's changes to [loss], e.g. {gram = 0.0}

    def __post_init__(self) -> None:
        try:
            registry.knobs(self.family, self.knobs)  # validates the family, knob names and values
        except ValueError as e:
            raise InputError(f"student {self.name}: {e}") from None
        _check_loss(f"student {self.name}", self.loss)
        if self.steps < 1:
            raise InputError(f"student {self.name}: steps={self.steps} must be at least 1")

    def losses(self, base: LossWeights) -> LossWeights:
        """The recipe's [loss] with this student's changes."""
        return replace(base, **self.loss)


def _check_loss(owner: str, loss: dict) -> None:
    """Per-candidate loss changes: names of LossWeights fields, valid values."""
    known = {f.name for f in fields(LossWeights)}
    for k in loss:
        if k not in known:
            raise InputError(f"{owner}: loss.{k}: unknown loss setting (known: {', '.join(sorted(known))})")
    LossWeights(**loss)  # validates the values


@dataclass
class PruneSpec:
    name: str
    parent: str                    # a student name in this recipe, or "teacher" (needs its checkpoint)
    ratio: float = 0.3             # fraction of the parent's conv weights removed
    steps: int = 800               # recovery distillation
    lr: float = 5e-4
    # "l1": filter L1 norm (Li et al. 2017), for students; "norm_scale": instance-norm
    # |gamma| (Liu et al. 2017), for the teacher; "auto": whichever fits the parent
    rank: str = "auto"
    loss: dict = field(default_factory=dict)  # changes to [loss] for the recovery, e.g. {gram = 0.0}

    def __post_init__(self) -> None:
        _check_loss(f"prune {self.name}", self.loss)
        if self.steps < 1:
            raise InputError(f"prune {self.name}: steps={self.steps} must be at least 1")
        if not 0.05 <= self.ratio <= 0.9:
            raise InputError(f"prune {self.name}: ratio={self.ratio} must be between 0.05 and 0.9")
        if self.rank not in ("auto", "l1", "norm_scale"):
            raise InputError(f"prune {self.name}: rank={self.rank!r}; expected 'auto', 'l1' or 'norm_scale'")

    def check_parent(self, parent_family: str) -> None:
        """The parent's family can be pruned, and `rank` is how that family ranks channels."""
        f = registry.family(parent_family)
        if f.spaces is None:
            raise InputError(f"prune {self.name}: parent {self.parent!r} is of the {f.name} family, "
                             "which cannot be pruned")
        if self.rank not in ("auto", f.rank):
            raise InputError(f"prune {self.name}: rank={self.rank!r} does not fit parent {self.parent!r}; "
                             f"it is ranked by {f.rank!r}")

    def losses(self, base: LossWeights) -> LossWeights:
        """The recipe's [loss] with this entry's changes."""
        return replace(base, **self.loss)


@dataclass
class Recipe:
    crop: int = 160
    batch: int = 8
    cache_crops: int = 1500        # teacher targets computed once, reused by every student
    target_frame: str = "640x360"  # teacher styles whole frames of this size ("" = each crop alone)
    crops_per_frame: int = 8
    camera_augment: bool = True    # frames get exposure, white balance, blur, noise, JPEG (content.py)
    variety: FrameVariety = field(default_factory=FrameVariety)  # [variety]: turned, recoloured, mixed scenes
    seed: int = 0
    threads: int = 0
    device: str = "cpu"            # where distillation trains: cpu, cuda (or cuda:N), auto
    checkpoint_every: int = 100
    calibration_fraction: float = 0.15   # of content sources (split by source image)
    held_out_fraction: float = 0.15
    loss_net: str = "hed"          # loss-network source for the feature and Gram terms (lossnet.SOURCES)
    loss_weights: str = ""
    loss_seed: int = 0
    loss: LossWeights = field(default_factory=LossWeights)
    student: list[StudentSpec] = field(default_factory=list)
    prune: list[PruneSpec] = field(default_factory=list)
    int8: Int8Spec = field(default_factory=Int8Spec)

    def __post_init__(self) -> None:
        if self.crop % 16 or self.crop < 64:
            raise InputError(f"crop={self.crop}: must be a multiple of 16, at least 64")
        if self.target_frame:
            w, h = self.frame_size()
            if min(w, h) < self.crop:
                raise InputError(f"target_frame={self.target_frame!r}: smaller than crop={self.crop}")
        if self.crops_per_frame < 1:
            raise InputError(f"crops_per_frame={self.crops_per_frame}: must be at least 1")
        if not re.fullmatch(r"cpu|auto|cuda(:\d+)?", self.device):
            raise InputError(f"device={self.device!r}: one of cpu, cuda, cuda:N, auto")
        names = [s.name for s in self.student] + [p.name for p in self.prune]
        dup = {n for n in names if names.count(n) > 1}
        if dup:
            raise InputError(f"candidate name {sorted(dup)[0]!r} appears twice in the recipe")
        students = {s.name: s.family for s in self.student}
        if "teacher" in names:
            raise InputError("candidate name 'teacher' is reserved for the teacher")
        for p in self.prune:
            if p.parent not in students and p.parent != "teacher":
                raise InputError(f"prune {p.name}: parent {p.parent!r} is neither a student in this recipe "
                                 "nor 'teacher'")
            p.check_parent(students.get(p.parent, "teacher"))
        for m in self.int8.models:
            if m not in names:
                raise InputError(f"int8.models: {m!r} is not a candidate in this recipe")
        if not 0 <= self.calibration_fraction < 1 or not 0 <= self.held_out_fraction < 1 or \
                self.calibration_fraction + self.held_out_fraction >= 1:
            raise InputError("calibration_fraction + held_out_fraction must leave sources for distillation")

    def min_content_side(self) -> int:
        """The shortest side a distillation image may have. With whole frames (target_frame)
        a photo is resized to the frame before crops are cut, so it must only not be blown up
        more than 2x (half the frame's height); without, it must hold one crop."""
        return self.frame_size()[1] // 2 if self.target_frame else self.crop

    def frame_size(self) -> tuple[int, int]:
        try:
            w, h = (int(v) for v in self.target_frame.lower().split("x"))
        except ValueError:
            raise InputError(f"target_frame={self.target_frame!r}: expected WIDTHxHEIGHT, e.g. 640x360") from None
        if w % 8 or h % 8 or w < 64 or h < 64:
            raise InputError(f"target_frame={self.target_frame!r}: sides must be multiples of 8, at least 64")
        return w, h
