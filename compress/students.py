"""The student family: Johnson-style encoder / residual / decoder nets built for speed.

Int8-friendly by construction (docs/architecture.md): conv + bias + ReLU, zero padding, no
normalisation layers. Knobs:

- width: multiplier on the teacher's (32, 64, 128) channels,
- decoder_width: a further multiplier on the two upsampling stages' channels (the
  decoder draws the finest strokes at the highest resolutions; 1.0 mirrors the encoder),
- blocks: residual block count,
- kernel_in / kernel_out: first and last kernel sizes (teacher: 9),
- depthwise: depthwise-separable residual blocks,
- downscale: internal space-to-depth factor (1 = none, 2 = work at half size),
- upsample: "resize" (nearest resize + 3x3 conv) or "shuffle" (conv + pixel shuffle),
- context: frame-level context (layers.FrameFiLM) after the encoder, so the student can
  follow the teacher's whole-frame normalisation,
- context_blocks: with context, one more frame-context block after every residual block
  (the teacher normalises by whole-frame statistics in every block, not only once),
- context_spread: with context, every frame-context block also pools each channel's standard
  deviation over the frame, not only its mean (instance normalisation uses both).

`Student` itself takes explicit channel counts, so a pruned network (any channel
counts) is rebuilt from its checkpoint without guessing; `student_args` turns the
knobs into those explicit counts.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass

import torch
from limner.runtime.errors import InputError
from torch import nn

from .channel_space import ChannelSpace
from .layers import FrameFiLM, NearestUp2, Residual, Squash, conv

UPSAMPLE_MODES = ("resize", "shuffle")


@dataclass(frozen=True)
class StudentKnobs:
    width: float = 0.5
    decoder_width: float = 1.0
    blocks: int = 3
    kernel_in: int = 5
    kernel_out: int = 5
    depthwise: bool = False
    downscale: int = 1
    upsample: str = "resize"
    context: bool = False
    context_blocks: bool = False
    context_spread: bool = False

    def __post_init__(self) -> None:
        if not 0.05 <= self.width <= 2.0:
            raise InputError(f"width={self.width}: must be between 0.05 and 2.0")
        if not 0.25 <= self.decoder_width <= 4.0:
            raise InputError(f"decoder_width={self.decoder_width}: must be between 0.25 and 4.0")
        if not 0 <= self.blocks <= 16:
            raise InputError(f"blocks={self.blocks}: must be between 0 and 16")
        for name in ("kernel_in", "kernel_out"):
            k = getattr(self, name)
            if k not in (1, 3, 5, 7, 9):
                raise InputError(f"{name}={k}: must be one of 1, 3, 5, 7, 9")
        if self.downscale not in (1, 2, 4):
            raise InputError(f"downscale={self.downscale}: must be 1, 2 or 4")
        if self.upsample not in UPSAMPLE_MODES:
            raise InputError(f"upsample={self.upsample!r}: must be one of {UPSAMPLE_MODES}")
        if self.context_blocks and not self.context:
            raise InputError("context_blocks=true needs context=true")
        if self.context_spread and not self.context:
            raise InputError("context_spread=true needs context=true")


def _round_channels(c: float) -> int:
    """Round to a multiple of 4 (at least 4): SIMD-friendly, common practice, no source."""
    return max(4, int(round(c / 4.0)) * 4)


def student_args(knobs: StudentKnobs) -> dict:
    c1, c2, c3 = (_round_channels(c * knobs.width) for c in (32, 64, 128))
    u1, u2 = (_round_channels(c * knobs.width * knobs.decoder_width) for c in (64, 32))
    return {
        "channels": [c1, c2, c3],
        "hidden": [c3] * knobs.blocks,
        "up_channels": [u1, u2],
        "kernel_in": knobs.kernel_in,
        "kernel_out": knobs.kernel_out,
        "depthwise": knobs.depthwise,
        "downscale": knobs.downscale,
        "upsample": knobs.upsample,
        "context": max(8, c3 // 2) if knobs.context else 0,
        "context_blocks": knobs.context_blocks,
        "context_spread": knobs.context_spread,
        "knobs": asdict(knobs),
    }


def _relu() -> nn.ReLU:
    return nn.ReLU(inplace=True)


def _block(c: int, hidden: int, depthwise: bool) -> Residual:
    if depthwise:
        body = nn.Sequential(conv(c, c, 3, groups=c), conv(c, hidden, 1), _relu(),
                             conv(hidden, hidden, 3, groups=hidden), conv(hidden, c, 1))
    else:
        body = nn.Sequential(conv(c, hidden, 3), _relu(), conv(hidden, c, 3))
    return Residual(body)


def _up(cin: int, cout: int, mode: str) -> list[nn.Module]:
    if mode == "resize":
        return [NearestUp2(), conv(cin, cout, 3), _relu()]
    return [conv(cin, cout * 4, 3), nn.PixelShuffle(2), _relu()]


class Student(nn.Module):
    def __init__(self, channels: list[int], hidden: list[int], up_channels: list[int],
                 kernel_in: int = 5, kernel_out: int = 5, depthwise: bool = False,
                 downscale: int = 1, upsample: str = "resize", context: int = 0,
                 context_blocks: bool = False, context_spread: bool = False,
                 knobs: dict | None = None) -> None:
        super().__init__()
        c1, c2, c3 = channels
        u1, u2 = up_channels
        self.model_args = {"channels": list(channels), "hidden": list(hidden),
                           "up_channels": list(up_channels), "kernel_in": kernel_in,
                           "kernel_out": kernel_out, "depthwise": depthwise,
                           "downscale": downscale, "upsample": upsample,
                           "context": context, "context_blocks": context_blocks,
                           "context_spread": context_spread,
                           "knobs": dict(knobs or {})}
        self.size_multiple = 4 * downscale
        d2 = downscale * downscale
        layers: list[nn.Module] = []
        if downscale > 1:
            layers.append(nn.PixelUnshuffle(downscale))
        layers += [conv(3 * d2, c1, kernel_in), _relu(),
                   conv(c1, c2, 3, 2), _relu(),
                   conv(c2, c3, 3, 2), _relu()]
        if context:
            layers.append(FrameFiLM(c3, context, context_spread))
        for h in hidden:
            layers.append(_block(c3, h, depthwise))
            if context and context_blocks:
                layers.append(FrameFiLM(c3, context, context_spread))
        self.context_points = [i for i, m in enumerate(layers) if isinstance(m, FrameFiLM)]
        layers += _up(c3, u1, upsample) + _up(u1, u2, upsample)
        layers.append(conv(u2, 3 * d2, kernel_out))
        if downscale > 1:
            layers.append(nn.PixelShuffle(downscale))
        layers.append(Squash())
        self.net = nn.Sequential(*layers)

    def frame_stats(self, frame: torch.Tensor) -> tuple[torch.Tensor, ...]:
        """What each frame-context block pools over whole frames, without gradient
        (training only): the frames run up to the last such block, each block modulated
        by its own pooled input, as on a whole frame at run time.
        frame: (N, 3, Hf, Wf) RGB in [0, 1] -> one (N, c3, 1, 1) per context block
        ((N, 2 c3, 1, 1) with context_spread: FrameFiLM.pool)"""
        out = []
        with torch.no_grad():
            h, start = frame, 0
            for k in self.context_points:
                h = self.net[start:k](h)                # (N, c3, Hf/s, Wf/s)
                out.append(self.net[k].pool(h))
                h, start = self.net[k](h, out[-1]), k + 1
        return tuple(out)

    def forward(self, x: torch.Tensor, frame: torch.Tensor | None = None,
                stats: tuple[torch.Tensor, ...] | None = None) -> torch.Tensor:
        # x: (N, 3, H, W) RGB in [0, 1], H and W multiples of size_multiple
        # frame: (N, 3, Hf, Wf), the whole frame x was cropped from, or stats: its
        #   frame_stats (training only; by default a context student pools x itself)
        #   -> (N, 3, H, W) RGB in [0, 1]
        if not self.context_points or (stats is None and frame is None):
            return self.net(x)
        if stats is None:
            stats = self.frame_stats(frame)
        h, start = x, 0
        for k, s in zip(self.context_points, stats, strict=True):
            h = self.net[k](self.net[start:k](h), s)    # (N, c3, H/s, W/s)
            start = k + 1
        return self.net[start:](h)


# Named student shapes from slow-and-faithful to fast-and-rough: the tests build, export,
# count and prune every entry (recipes give their knobs explicitly instead).
PRESETS: dict[str, StudentKnobs] = {
    "s-wide": StudentKnobs(width=0.5, blocks=3, kernel_in=5, kernel_out=5),
    "s-mid": StudentKnobs(width=0.375, blocks=2, kernel_in=5, kernel_out=5),
    "s-half": StudentKnobs(width=0.5, blocks=3, kernel_in=3, kernel_out=3, downscale=2,
                           upsample="shuffle"),
    "s-dw": StudentKnobs(width=0.5, blocks=3, kernel_in=3, kernel_out=3, depthwise=True,
                         downscale=2, upsample="shuffle"),
    "s-tiny": StudentKnobs(width=0.25, blocks=1, kernel_in=3, kernel_out=3, downscale=2,
                           upsample="shuffle"),
}


def student_spaces(net: Student) -> dict[str, ChannelSpace]:
    """The student's prunable channel spaces (compress/prune.py), ranked by filter L1 norm:
    the residual stream (c3: the last downsampling conv, every block's output conv and the
    frame-context modulation) is one space; a pixel-shuffle channel is four filters."""
    a = net.model_args
    films = [m for m in net.net if isinstance(m, FrameFiLM)]
    in_film = {id(c) for f in films for c in f.modules()}
    convs = [m for m in net.net.modules() if isinstance(m, nn.Conv2d) and id(m) not in in_film]
    shuffle = 4 if a["upsample"] == "shuffle" else 1
    conv_in, d1, d2 = convs[0], convs[1], convs[2]
    per_block = 4 if a["depthwise"] else 2
    blocks = [convs[3 + i * per_block: 3 + (i + 1) * per_block] for i in range(len(a["hidden"]))]
    up1, up2, conv_out = convs[3 + len(blocks) * per_block:]
    sp = {"c1": ChannelSpace(a["channels"][0], [(conv_in, 1)], [d1], []),
          "c2": ChannelSpace(a["channels"][1], [(d1, 1)], [d2], []),
          "c3": ChannelSpace(a["channels"][2], [(d2, 1)], [up1], []),
          "u1": ChannelSpace(a["up_channels"][0], [(up1, shuffle)], [up2], []),
          "u2": ChannelSpace(a["up_channels"][1], [(up2, shuffle)], [conv_out], [])}
    for f in films:  # frame context reads and modulates the residual stream
        sp["c3"].consumers += [f.squeeze] + ([f.spread] if f.spread is not None else [])
        sp["c3"].producers += [(f.gamma, 1), (f.beta, 1)]
    for i, b in enumerate(blocks):
        if a["depthwise"]:
            dw1, pw1, dw2, pw2 = b
            sp["c3"].depthwise.append(dw1)
            sp["c3"].consumers.append(pw1)
            sp["c3"].producers.append((pw2, 1))
            sp[f"h{i}"] = ChannelSpace(a["hidden"][i], [(pw1, 1)], [pw2], [dw2])
        else:
            ca, cb = b
            sp["c3"].consumers.append(ca)
            sp["c3"].producers.append((cb, 1))
            sp[f"h{i}"] = ChannelSpace(a["hidden"][i], [(ca, 1)], [cb], [])
    return sp


def student_shrunk(net: Student, n: dict[str, int]) -> Student:
    """A fresh student with `n[space]` channels in each of student_spaces' spaces."""
    a = net.model_args
    hidden = [n[f"h{i}"] for i in range(len(a["hidden"]))]
    return Student(channels=[n["c1"], n["c2"], n["c3"]], hidden=hidden, up_channels=[n["u1"], n["u2"]],
                   kernel_in=a["kernel_in"], kernel_out=a["kernel_out"], depthwise=a["depthwise"],
                   downscale=a["downscale"], upsample=a["upsample"], context=a.get("context", 0),
                   context_blocks=a.get("context_blocks", False),
                   context_spread=a.get("context_spread", False), knobs=a["knobs"])
