"""Shared fixtures: real photos from scikit-image's bundled sample data."""
from __future__ import annotations

import os
import sys
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[1]


def sample_photos() -> dict[str, np.ndarray]:
    """scikit-image's bundled natural colour photos, as BGR uint8 (OpenCV's layout)."""
    import skimage.data as d

    return {n: np.ascontiguousarray(getattr(d, n)()[:, :, ::-1])
            for n in ("astronaut", "chelsea", "coffee", "rocket")}


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
