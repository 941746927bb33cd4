"""Paths of what ships inside the package: the live default, the teacher it was
compressed from, the candidate ladder and the demo photos."""
from __future__ import annotations

from pathlib import Path

ASSETS = Path(__file__).parent / "assets"
MODELS = ASSETS / "models"
# The candidate `limner pick` chose on the build machine (a copy; DEVELOPERS.md).
DEFAULT_MODEL = MODELS / "default.onnx"
TEACHER_MODEL = MODELS / "ember-teacher.onnx"
CANDIDATES = ASSETS / "candidates" / "ember"
PHOTOS = ASSETS / "photos"
# Split by source image (SOURCES.md): the demo teacher and students never saw these.
HELD_OUT_PHOTOS = ("chelsea", "grace_hopper")
TRAIN_PHOTOS = ("astronaut", "coffee", "rocket")


def photo(name: str) -> Path:
    return PHOTOS / f"{name}.jpg"
