"""The error type of `limner compress` (its own module, so every compress module can raise it
without importing the pipeline)."""
from __future__ import annotations

from limner.runtime.errors import InputError


class CompressError(InputError):
    pass
