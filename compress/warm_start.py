"""Warm starts: a recipe's student begins from a checkpoint (`init` in its entry) that may
be shallower, narrower, without frame context or at another downscale than the knobs build."""
from __future__ import annotations

from pathlib import Path

import torch

from . import checkpoint as ckptmod
from .errors import CompressError
from .layers import FrameFiLM, Residual


def _widen(old: torch.Tensor, fresh: torch.Tensor) -> torch.Tensor:
    """A conv weight (out, in, kh, kw) or bias (out,) of a wider layer: the old values in
    the leading channels, zero weights from the new input channels, fresh new outputs."""
    w = fresh.clone()
    if w.dim() == 4:
        w[:, old.shape[1]:] = 0
    w[tuple(slice(0, n) for n in old.shape)] = old
    return w


def init_from(path: str, fresh: torch.nn.Module, name: str) -> torch.nn.Module:
    """Start a student from a checkpoint (e.g. one distilled with other targets). The
    architecture must be the one the recipe's knobs build, except that a student with
    frame context may start from the same student without it (the context block starts
    as the identity), a student may start from one at another `downscale`: the body
    is the same, and the first and last convs, whose channel counts follow the
    downscale, keep their fresh initialisation; and a student may start from one with
    fewer residual blocks of the same widths: the extra blocks come last and start as
    the identity (their last conv zero), so the deeper student starts as the shallower
    one and training only adds to it; and a student may start from a narrower one
    (`width`, with resize upsampling): every conv keeps the old weights in its leading
    channels, its new output channels keep their fresh initialisation and its weights
    from new input channels start at zero, so the wider student computes exactly what the
    narrower one did (function-preserving widening, as in Net2Net, Chen et al. 2016, with
    zero-initialised consumers instead of copied units) and training uses the new
    channels from there. Frame-context blocks the old student lacks (after the encoder, or
    after each residual block with `context_blocks`) start as the identity, and so do the
    standard-deviation inputs (`context_spread`) of blocks the old student has without them."""
    try:
        old = ckptmod.load(Path(path)).model()
    except ckptmod.CheckpointError as e:
        raise CompressError(f"student {name}: init: {e}") from None
    widths = ("channels", "up_channels", "hidden", "context")
    def shape(args: dict) -> dict:
        free = ("knobs", "downscale", "context_blocks", "context_spread") + widths
        return {k: v for k, v in args.items() if k not in free}
    oa, fa = old.model_args, fresh.model_args
    old_hidden, new_hidden = list(oa["hidden"]), list(fa["hidden"])
    fits = (len(oa["channels"]) == len(fa["channels"]) and len(old_hidden) <= len(new_hidden)
            and all(o <= f for k in ("channels", "up_channels")
                    for o, f in zip(oa[k], fa[k], strict=True))
            and all(o <= f for o, f in zip(old_hidden, new_hidden))
            and (not oa.get("context") or 0 < oa["context"] <= fa.get("context", 0))
            and (not oa.get("context_spread") or fa.get("context_spread", False)))
    widened = any(oa[k] != fa[k] for k in ("channels", "up_channels")) or \
        new_hidden[:len(old_hidden)] != old_hidden
    if shape(oa) != shape(fa) or not fits or (widened and fa["upsample"] != "resize"):
        raise CompressError(f"student {name}: init={path} holds a different architecture "
                            f"({oa.get('knobs')}) than the recipe's knobs")
    # context blocks shift the indices of the layers after them: match tensors in order,
    # skipping the fresh student's context blocks that the old one lacks
    old_films = _film_places(old)
    films = [i for i, after in _film_places(fresh).items() if after not in old_films.values()]
    # extra residual blocks (the last ones) keep their initialisation, made the identity
    blocks = [i for i, m in enumerate(fresh.net) if isinstance(m, Residual)]
    extra = blocks[len(old_hidden):]
    for i in extra:
        last = [m for m in fresh.net[i].body if isinstance(m, torch.nn.Conv2d)][-1]
        with torch.no_grad():
            last.weight.zero_()
            last.bias.zero_()
    skip = tuple(f"net.{i}." for i in extra + films)
    if fa.get("context_spread") and not oa.get("context_spread"):  # zero at construction
        skip += tuple(f"net.{i}.spread." for i in _film_places(fresh))
    fresh_sd = fresh.state_dict()
    targets = [k for k in fresh_sd if not k.startswith(skip)]
    old_sd = old.state_dict()
    if len(targets) != len(old_sd):
        raise CompressError(f"student {name}: init={path}: weights do not fit the recipe's knobs")
    pairs = list(zip(targets, old_sd.values()))
    rescaled = oa.get("downscale", 1) != fa.get("downscale", 1)
    ends = set(targets[:2] + targets[-2:]) if rescaled else set()  # these start fresh
    for k, v in pairs:
        if k in ends and fresh_sd[k].shape != v.shape:
            continue
        if fresh_sd[k].shape == v.shape:
            fresh_sd[k] = v
        elif widened and v.dim() == fresh_sd[k].dim() and \
                all(o <= f for o, f in zip(v.shape, fresh_sd[k].shape)):
            fresh_sd[k] = _widen(v, fresh_sd[k])
        else:
            raise CompressError(f"student {name}: init={path}: weights do not fit the recipe's knobs")
    fresh.load_state_dict(fresh_sd)
    return fresh.train()


def _film_places(net: torch.nn.Module) -> dict[int, int]:
    """Each frame-context block's layer index -> how many residual blocks precede it."""
    out, blocks = {}, 0
    for i, m in enumerate(getattr(net, "net", [])):
        blocks += isinstance(m, Residual)
        if isinstance(m, FrameFiLM):
            out[i] = blocks
    return out
