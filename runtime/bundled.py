"""Paths of what ships inside the package: the default model and the demo photos."""
from __future__ import annotations

from pathlib import Path

ASSETS = Path(__file__).parent / "assets"
MODELS = ASSETS / "models"
DEFAULT_MODEL = MODELS / "default.onnx"
PHOTOS = ASSETS / "photos"
# Split by source image (SOURCES.md): the demo teacher and students never saw these.
HELD_OUT_PHOTOS = ("chelsea", "grace_hopper")
TRAIN_PHOTOS = ("astronaut", "coffee", "rocket")


def photo(name: str) -> Path:
    return PHOTOS / f"{name}.jpg"
