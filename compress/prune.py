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

Each family states its channel spaces beside its constructor (students.py, teacher.py;
registry.Family.spaces) instead of a general-purpose structural-pruning library tracing
the graph to rediscover what the constructor already states; this module ranks, slices
and rebuilds for any family that states them.
"""
from __future__ import annotations

import torch
from limner.runtime.errors import InputError
from torch import nn

from .channel_space import ChannelSpace
from .registry import Family, family, family_of


def _importance(s: ChannelSpace) -> torch.Tensor:
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


def _keep_counts(sp: dict[str, ChannelSpace], frac: float, multiple: int) -> dict[str, int]:
    return {k: max(multiple, min(s.size, int(round(s.size * frac / multiple)) * multiple)) for k, s in sp.items()}


def _rows(idx: torch.Tensor, rows: int) -> torch.Tensor:
    return (idx[:, None] * rows + torch.arange(rows)[None, :]).reshape(-1)


def _prunable(net: nn.Module) -> Family:
    f = family(family_of(net))
    if f.spaces is None or f.shrunk is None:
        raise InputError(f"the {f.name} family states no channel spaces: it cannot be pruned")
    return f


def spaces(net: nn.Module) -> dict[str, ChannelSpace]:
    """The network's prunable channel spaces, as its family states them."""
    return _prunable(net).spaces(net)


def prune_to(net: nn.Module, keep: dict[str, torch.Tensor]) -> nn.Module:
    """Build a smaller network of the same family keeping the given channel indices of
    each space. For the teacher, each removed channel's constant part (ReLU(beta)) is
    folded into the bias of a consumer not followed by normalisation (the last conv)."""
    new = _prunable(net).shrunk(net, {k: len(v) for k, v in keep.items()})
    kinds = (nn.Conv2d, nn.InstanceNorm2d)
    old_mods = [m for m in net.net.modules() if isinstance(m, kinds)]
    new_mods = [m for m in new.net.modules() if isinstance(m, kinds)]
    sp = spaces(net)
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
            if b is not None:  # a bias-free conv (FrameFiLM.spread) stays bias-free
                n.bias.copy_(b)
    return new.eval()


def prune(net: nn.Module, ratio: float, tolerance: float = 0.05) -> nn.Module:
    """Remove the lowest-ranked channels so the conv weight count falls by `ratio`
    (within `tolerance` of the target), the same keep fraction in every space."""
    sp = spaces(net)
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
    raise InputError(f"cannot reach a {ratio:.0%} reduction within {tolerance:.0%} for this network")
