"""Paths of what ships inside the package: the live default, the teacher it was
compressed from, the candidate ladder, the photo corpus and the demo video."""
from __future__ import annotations

from pathlib import Path

ASSETS = Path(__file__).parent / "assets"
MODELS = ASSETS / "models"
# The candidate `limner pick` chose on the build machine (a copy; DEVELOPERS.md).
DEFAULT_MODEL = MODELS / "default.onnx"
TEACHER_MODEL = MODELS / "ember-teacher.onnx"
CANDIDATES = ASSETS / "candidates" / "ember"
# Split by source image (photos/SOURCES.md): train, calib, heldout.
PHOTOS = ASSETS / "photos"
TRAIN_PHOTOS = PHOTOS / "train"
CALIB_PHOTOS = PHOTOS / "calib"
HELD_OUT_PHOTOS = PHOTOS / "heldout"
STREET_CLIP = ASSETS / "clips" / "street.mp4"
