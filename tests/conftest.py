"""Shared fixtures: real photos (scikit-image's bundled sample data and Limner's bundled
held-out corpus, runtime/assets/photos/heldout; sources in its SOURCES.md)."""
from __future__ import annotations

import os
import sys
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[1]


HELD_OUT = REPO / "runtime" / "assets" / "photos" / "heldout"


def sample_photos() -> dict[str, np.ndarray]:
    """Natural colour photos as BGR uint8 (OpenCV's layout): chelsea and coffee from
    scikit-image itself, fruits and squirrel from the bundled held-out corpus."""
    import cv2
    import skimage.data as d

    out = {n: np.ascontiguousarray(getattr(d, n)()[:, :, ::-1]) for n in ("chelsea", "coffee")}
    out |= {n: cv2.imread(str(HELD_OUT / f"{n}.jpg"), cv2.IMREAD_COLOR) for n in ("fruits", "squirrel")}
    return out


@pytest.fixture(scope="session")
def photos() -> dict[str, np.ndarray]:
    return sample_photos()


@pytest.fixture(scope="session")
def teacher_onnx(tmp_path_factory) -> Path:
    """A seeded (untrained) teacher exported through the real export path."""
    import torch

    from limner.compress import checkpoint as ck
    from limner.compress.export import export
    from limner.compress.registry import build

    torch.manual_seed(0)
    net = build("teacher")
    d = tmp_path_factory.mktemp("teacher")
    ck.save(ck.from_model(net, {"style": "seeded", "loss_network": "none"}), d / "t.pt")
    return export(d / "t.pt", d / "teacher.onnx")


@pytest.fixture
def cli_env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO / "tests"), env.get("PYTHONPATH", "")]))
    return env


PY = sys.executable
