"""Structured pruning of students: whole channels are removed and the convolutions
are rebuilt smaller (not masked).

Channels are ranked by the L1 norm of the filters that produce them (Li et al. 2017,
"Pruning Filters for Efficient ConvNets"). Channels that meet at residual adds form
one group (the residual stream: the last downsampling conv and every block's output
conv) and are ranked by their summed norms and pruned together. With pixel-shuffle
upsampling a channel is produced by four consecutive filters, pruned as a unit.

We write this small grouping for our own family instead of using a general-purpose
structural-pruning library: the family has six kinds of channel space, all known
from `model_args`, and a library would add a dependency that traces the graph to
rediscover what the constructor already states.
"""
from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import nn

from .layers import FrameFiLM
from .students import Student


@dataclass
class _Space:
    """One prunable channel space: who produces it (rows) and who consumes it (cols)."""
    size: int
    producers: list[tuple[nn.Conv2d, int]]   # (conv, rows per channel: 1, or 4 before a shuffle)
    consumers: list[nn.Conv2d]                # input channels sliced
    depthwise: list[nn.Conv2d]                # grouped convs whose channels follow the space


def _spaces(net: Student) -> dict[str, _Space]:
    a = net.model_args
    films = [m for m in net.net if isinstance(m, FrameFiLM)]
    in_film = {id(c) for f in films for c in f.modules()}
    convs = [m for m in net.net.modules() if isinstance(m, nn.Conv2d) and id(m) not in in_film]
    shuffle = 4 if a["upsample"] == "shuffle" else 1
    conv_in, d1, d2 = convs[0], convs[1], convs[2]
    per_block = 4 if a["depthwise"] else 2
    blocks = [convs[3 + i * per_block: 3 + (i + 1) * per_block] for i in range(len(a["hidden"]))]
    rest = convs[3 + len(blocks) * per_block:]
    up1, up2, conv_out = rest
    sp = {"c1": _Space(a["channels"][0], [(conv_in, 1)], [d1], []),
          "c2": _Space(a["channels"][1], [(d1, 1)], [d2], []),
          "c3": _Space(a["channels"][2], [(d2, 1)], [up1], []),
          "u1": _Space(a["up_channels"][0], [(up1, shuffle)], [up2], []),
          "u2": _Space(a["up_channels"][1], [(up2, shuffle)], [conv_out], [])}
    for f in films:  # frame context reads and modulates the residual stream
        sp["c3"].consumers.append(f.squeeze)
        sp["c3"].producers += [(f.gamma, 1), (f.beta, 1)]
    for i, b in enumerate(blocks):
        if a["depthwise"]:
            dw1, pw1, dw2, pw2 = b
            sp["c3"].depthwise.append(dw1)
            sp["c3"].consumers.append(pw1)
            sp["c3"].producers.append((pw2, 1))
            sp[f"h{i}"] = _Space(a["hidden"][i], [(pw1, 1)], [pw2], [dw2])
        else:
            ca, cb = b
            sp["c3"].consumers.append(ca)
            sp["c3"].producers.append((cb, 1))
            sp[f"h{i}"] = _Space(a["hidden"][i], [(ca, 1)], [cb], [])
    return sp


def _importance(s: _Space) -> torch.Tensor:
    score = torch.zeros(s.size)
    for conv, rows in s.producers:
        w = conv.weight.detach().abs().sum(dim=(1, 2, 3))  # L1 norm per output filter
        score += w.view(s.size, rows).sum(1)
    return score


def conv_weight_count(net: nn.Module) -> int:
    return sum(m.weight.numel() for m in net.modules() if isinstance(m, nn.Conv2d))


def _keep_counts(sp: dict[str, _Space], frac: float, multiple: int) -> dict[str, int]:
    return {k: max(multiple, min(s.size, int(round(s.size * frac / multiple)) * multiple)) for k, s in sp.items()}


def _rows(idx: torch.Tensor, rows: int) -> torch.Tensor:
    return (idx[:, None] * rows + torch.arange(rows)[None, :]).reshape(-1)


def prune_to(net: Student, keep: dict[str, torch.Tensor]) -> Student:
    """Build a smaller Student keeping the given channel indices of each space."""
    a = dict(net.model_args)
    nh = len(a["hidden"])
    new = Student(channels=[len(keep["c1"]), len(keep["c2"]), len(keep["c3"])],
                  hidden=[len(keep[f"h{i}"]) for i in range(nh)],
                  up_channels=[len(keep["u1"]), len(keep["u2"])],
                  kernel_in=a["kernel_in"], kernel_out=a["kernel_out"], depthwise=a["depthwise"],
                  downscale=a["downscale"], upsample=a["upsample"], context=a.get("context", 0),
                  knobs=a["knobs"])
    old_convs = [m for m in net.net.modules() if isinstance(m, nn.Conv2d)]
    new_convs = [m for m in new.net.modules() if isinstance(m, nn.Conv2d)]
    sp = _spaces(net)
    out_idx: dict[int, torch.Tensor] = {}
    in_idx: dict[int, torch.Tensor] = {}
    for name, s in sp.items():
        k = keep[name]
        for conv, rows in s.producers:
            out_idx[id(conv)] = _rows(k, rows)
        for conv in s.consumers:
            in_idx[id(conv)] = k
        for conv in s.depthwise:
            out_idx[id(conv)] = k
    with torch.no_grad():
        for o, n in zip(old_convs, new_convs):
            w, b = o.weight, o.bias
            if id(o) in out_idx:
                w, b = w[out_idx[id(o)]], b[out_idx[id(o)]]
            if id(o) in in_idx and o.groups == 1:
                w = w[:, in_idx[id(o)]]
            if n.weight.shape != w.shape:
                raise RuntimeError(f"pruning produced {tuple(w.shape)} for a {tuple(n.weight.shape)} conv")
            n.weight.copy_(w)
            n.bias.copy_(b)
    return new.eval()


def prune(net: Student, ratio: float, tolerance: float = 0.05) -> Student:
    """Remove the lowest-L1 channels so the conv weight count falls by `ratio`
    (within `tolerance` of the target), the same keep fraction in every space."""
    if not isinstance(net, Student):
        raise ValueError(f"pruning is implemented for students, not {type(net).__name__}")
    sp = _spaces(net)
    parent = conv_weight_count(net)
    target = (1 - ratio) * parent
    order = {k: torch.argsort(_importance(s), descending=True) for k, s in sp.items()}
    best = None
    for multiple in (4, 1):
        lo, hi = 0.0, 1.0
        for _ in range(40):
            mid = (lo + hi) / 2
            counts = _keep_counts(sp, mid, multiple)
            keep = {k: torch.sort(order[k][:c]).values for k, c in counts.items()}
            cand = prune_to(net, keep)
            n = conv_weight_count(cand)
            if best is None or abs(n - target) < abs(conv_weight_count(best) - target):
                best = cand
            if n > target:
                hi = mid
            else:
                lo = mid
        if abs(conv_weight_count(best) - target) <= tolerance * parent:
            return best
    raise ValueError(f"cannot reach a {ratio:.0%} reduction within {tolerance:.0%} for this network")
