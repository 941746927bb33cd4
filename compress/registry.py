"""Network families: one entry per family names everything the rest of Limner needs to
build, rebuild, configure and prune it.

To add a student family: write its module beside students.py (the nn.Module whose
constructor takes explicit `model_args`, a frozen knobs dataclass, knobs -> model_args,
and, if it can be pruned, its channel spaces and a shrunk copy), then add one `Family`
to FAMILIES below. A recipe picks it with `family = "NAME"` in a [[student]] table.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

from limner.runtime.errors import InputError
from torch import nn

from .channel_space import ChannelSpace
from .students import (
    Student,
    StudentKnobs,
    student_args,
    student_shrunk,
    student_spaces,
)
from .teacher import Teacher, TeacherKnobs, teacher_args, teacher_shrunk, teacher_spaces


@dataclass(frozen=True)
class Family:
    name: str
    net: type[nn.Module]                         # constructor taking the checkpoint's model_args
    knobs: type                                  # frozen dataclass of the user-facing knobs
    args: Callable[[Any], dict]                  # knobs -> model_args
    # pruning (compress/prune.py); None: the family cannot be pruned
    spaces: Callable[[nn.Module], dict[str, ChannelSpace]] | None = None
    shrunk: Callable[[nn.Module, dict[str, int]], nn.Module] | None = None
    rank: str = "l1"                             # how its channels are ranked: "l1" or "norm_scale"


FAMILIES: dict[str, Family] = {f.name: f for f in (
    Family("teacher", Teacher, TeacherKnobs, teacher_args, teacher_spaces, teacher_shrunk, "norm_scale"),
    Family("student", Student, StudentKnobs, student_args, student_spaces, student_shrunk, "l1"),
)}


def families() -> list[str]:
    return sorted(FAMILIES)


def family(name: str) -> Family:
    if name not in FAMILIES:
        raise InputError(f"unknown network family {name!r}; known: {', '.join(families())}")
    return FAMILIES[name]


def knobs(name: str, values: dict) -> Any:
    """The family's knobs dataclass from a recipe table; errors name the bad knob."""
    f = family(name)
    try:
        return f.knobs(**values)
    except TypeError as e:  # unknown knob names
        raise InputError(f"bad knobs for {name!r}: {e}") from None


def build(name: str, **values: Any) -> nn.Module:
    """Build a fresh network of family `name` from its knobs."""
    f = family(name)
    return f.net(**f.args(knobs(name, values)))


def rebuild(name: str, model_args: dict) -> nn.Module:
    """Rebuild a network from the explicit args stored in its checkpoint."""
    return family(name).net(**model_args)


def family_of(model: nn.Module) -> str:
    for name, f in FAMILIES.items():
        if type(model) is f.net:
            return name
    raise InputError(f"{type(model).__name__} is not a registered family")

