"""Network registry: `build(name, **knobs)` and rebuilding from checkpoint args."""
from __future__ import annotations

from typing import Any, Callable

from torch import nn

from .students import Student, StudentKnobs, student_args
from .teacher import Teacher


def _teacher(**kw: Any) -> Teacher:
    return Teacher(**kw)


def _student(**knobs: Any) -> Student:
    return Student(**student_args(StudentKnobs(**knobs)))


# name -> constructor taking user-facing knobs
_BUILDERS: dict[str, Callable[..., nn.Module]] = {"teacher": _teacher, "student": _student}
# name -> constructor taking the explicit `model_args` saved in checkpoints
_REBUILDERS: dict[str, Callable[..., nn.Module]] = {"teacher": Teacher, "student": Student}


def families() -> list[str]:
    return sorted(_BUILDERS)


def build(name: str, **knobs: Any) -> nn.Module:
    """Build a fresh network of family `name` from its knobs."""
    if name not in _BUILDERS:
        raise ValueError(f"unknown network family {name!r}; known: {', '.join(families())}")
    try:
        return _BUILDERS[name](**knobs)
    except TypeError as e:  # unknown knob names
        raise ValueError(f"bad knobs for {name!r}: {e}") from None


def rebuild(name: str, model_args: dict) -> nn.Module:
    """Rebuild a network from the explicit args stored in its checkpoint."""
    if name not in _REBUILDERS:
        raise ValueError(f"unknown network family {name!r}; known: {', '.join(families())}")
    return _REBUILDERS[name](**model_args)


def family_of(model: nn.Module) -> str:
    for name, cls in _REBUILDERS.items():
        if type(model) is cls:
            return name
    raise ValueError(f"{type(model).__name__} is not a registered family")
