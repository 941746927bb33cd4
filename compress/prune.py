"""Structured pruning of students and of the teacher: whole channels are removed and
the convolutions are rebuilt smaller (not masked).

Student channels are ranked by the L1 norm of the filters that produce them (Li et al.
2017, "Pruning Filters for Efficient ConvNets"). The teacher normalises every conv's
output (instance normalisation), which makes its filter norms meaningless; its channels
are ranked by the normalisation scale |gamma| instead (Liu et al. 2017, "Learning
Efficient Convolutional Networks through Network Slimming"). A teacher channel with
gamma = 0 is the constant beta: every consumer but the last conv is followed by
instance normalisation, which removes a constant, and for the last conv the constant's
contribution is folded into its bias, so removing such channels is exact.
Channels that meet at residual adds form one group (the residual stream: the last
downsampling conv and every block's output conv) and are ranked by their summed
scores and pruned together. With pixel-shuffle upsampling a channel is produced by
four consecutive filters, pruned as a unit.

We write this small grouping for our own family instead of using a general-purpose
structural-pruning library: the family has six kinds of channel space, all known
from `model_args`, and a library would add a dependency that traces the graph to
rediscover what the constructor already states.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import torch
from torch import nn

from .layers import FrameFiLM, Residual
from .students import Student
from .teacher import Teacher

Prunable = Student | Teacher


@dataclass
class _Space:
    """One prunable channel space: who produces it (rows) and who consumes it (cols)."""
    size: int
    producers: list[tuple[nn.Conv2d, int]]   # (conv, rows per channel: 1, or 4 before a shuffle)
    consumers: list[nn.Conv2d]                # input channels sliced
    depthwise: list[nn.Conv2d]                # grouped convs whose channels follow the space
    norms: list[nn.InstanceNorm2d] = field(default_factory=list)  # teacher: sliced like producers


def _teacher_spaces(net: Teacher) -> dict[str, _Space]:
    mods = list(net.net)
    convs = [m for m in mods if isinstance(m, nn.Conv2d)]
    norms = [m for m in mods if isinstance(m, nn.InstanceNorm2d)]
    blocks = [m.body for m in mods if isinstance(m, Residual)]
    conv_in, d1, d2, up1, up2, conv_out = convs
    n_in, n1, n2, nu1, nu2 = norms
    a = net.model_args
    c1, c2, c3 = a["channels"]
    u1, u2 = a.get("up_channels", [c2, c1])
    sp = {"c1": _Space(c1, [(conv_in, 1)], [d1], [], [n_in]),
          "c2": _Space(c2, [(d1, 1)], [d2], [], [n1]),
          "c3": _Space(c3, [(d2, 1)], [up1], [], [n2]),
          "u1": _Space(u1, [(up1, 1)], [up2], [], [nu1]),
          "u2": _Space(u2, [(up2, 1)], [conv_out], [], [nu2])}
    for i, b in enumerate(blocks):
        ca, na, _, cb, nb = b
        sp["c3"].consumers.append(ca)
        sp["c3"].producers.append((cb, 1))
        sp["c3"].norms.append(nb)
        sp[f"h{i}"] = _Space(ca.out_channels, [(ca, 1)], [cb], [], [na])
    return sp


def _spaces(net: Prunable) -> dict[str, _Space]:
    if isinstance(net, Teacher):
        return _teacher_spaces(net)
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
    if s.norms:  # Liu et al. 2017: the normalisation scale
        for n in s.norms:
            score += n.weight.detach().abs()
        return score
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


def _smaller(net: Prunable, keep: dict[str, torch.Tensor]) -> Prunable:
    """A fresh network of the same family with the kept channel counts."""
    a = net.model_args
    n = {k: len(v) for k, v in keep.items()}
    nh = sum(1 for k in keep if k.startswith("h"))
    hidden = [n[f"h{i}"] for i in range(nh)]
    if isinstance(net, Teacher):
        return Teacher(channels=[n["c1"], n["c2"], n["c3"]], blocks=a["blocks"], hidden=hidden,
                       up_channels=[n["u1"], n["u2"]])
    return Student(channels=[n["c1"], n["c2"], n["c3"]], hidden=hidden, up_channels=[n["u1"], n["u2"]],
                   kernel_in=a["kernel_in"], kernel_out=a["kernel_out"], depthwise=a["depthwise"],
                   downscale=a["downscale"], upsample=a["upsample"], context=a.get("context", 0),
                   knobs=a["knobs"])


def prune_to(net: Prunable, keep: dict[str, torch.Tensor]) -> Prunable:
    """Build a smaller network of the same family keeping the given channel indices of
    each space. For the teacher, each removed channel's constant part (ReLU(beta)) is
    folded into the bias of a consumer not followed by normalisation (the last conv)."""
    new = _smaller(net, keep)
    kinds = (nn.Conv2d, nn.InstanceNorm2d)
    old_mods = [m for m in net.net.modules() if isinstance(m, kinds)]
    new_mods = [m for m in new.net.modules() if isinstance(m, kinds)]
    sp = _spaces(net)
    out_idx: dict[int, torch.Tensor] = {}
    in_idx: dict[int, torch.Tensor] = {}
    bias_add: dict[int, torch.Tensor] = {}
    last_conv = [m for m in old_mods if isinstance(m, nn.Conv2d)][-1]
    for name, s in sp.items():
        k = keep[name]
        for conv, rows in s.producers:
            out_idx[id(conv)] = _rows(k, rows)
        for norm in s.norms:
            out_idx[id(norm)] = k
        for conv in s.consumers:
            in_idx[id(conv)] = k
            if s.norms and conv is last_conv:
                if len(s.norms) != 1:  # the level of a channel summed from several norms is not one beta
                    raise RuntimeError(f"space {name}: cannot fold removed channels of {len(s.norms)} norms")
                gone = torch.ones(s.size, dtype=torch.bool)
                gone[k] = False
                level = torch.relu(s.norms[0].bias.detach()) * gone     # (C_in,)
                bias_add[id(conv)] = conv.weight.detach().sum((2, 3)) @ level
        for conv in s.depthwise:
            out_idx[id(conv)] = k
    with torch.no_grad():
        for o, n in zip(old_mods, new_mods):
            w, b = o.weight, o.bias
            if id(o) in out_idx:
                w, b = w[out_idx[id(o)]], b[out_idx[id(o)]]
            if id(o) in in_idx and o.groups == 1:
                w = w[:, in_idx[id(o)]]
            if id(o) in bias_add:
                b = b + bias_add[id(o)]
            if n.weight.shape != w.shape:
                raise RuntimeError(f"pruning produced {tuple(w.shape)} for a {tuple(n.weight.shape)} layer")
            n.weight.copy_(w)
            n.bias.copy_(b)
    return new.eval()


def prune(net: Prunable, ratio: float, tolerance: float = 0.05) -> Prunable:
    """Remove the lowest-ranked channels so the conv weight count falls by `ratio`
    (within `tolerance` of the target), the same keep fraction in every space."""
    if not isinstance(net, (Student, Teacher)):
        raise ValueError(f"pruning is implemented for the student family and the teacher, "
                         f"not {type(net).__name__}")
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
