"""Every bundled style has a ladder distilled from its bundled teacher, with pruned and int8 rungs.

The manifest names the teacher by the SHA-256 of its ONNX file, so a ladder left over from an
earlier teacher of the same style fails here (common practice, no source: a record that no
longer matches the model it describes).
"""
from __future__ import annotations

import json

import numpy as np
import onnx
import pytest

from limner.bench.metrics import ms_ssim
from limner.runtime.bundled import ASSETS, HELD_OUT_PHOTOS, MODELS
from limner.runtime.hashing import file_sha256
from limner.runtime.images import cover_crop, read_image
from limner.runtime.model import load_model
from limner.runtime.styles import STYLES

from test_compress import assert_int8_convs


@pytest.mark.parametrize("style", sorted(STYLES))
def test_ladder_is_bundled_from_the_current_teacher(style):
    folder = ASSETS / "candidates" / style
    man = json.loads((folder / "manifest.json").read_text())
    assert man["teacher"]["sha256"] == file_sha256(MODELS / f"{style}-teacher.onnx")
    cands = man["candidates"]
    assert {c["role"] for c in cands.values()} >= {"student", "pruned"}
    assert any(c["precision"] == "int8" for c in cands.values())
    frame = cover_crop(read_image(HELD_OUT_PHOTOS / "fruits.jpg"), 320, 192)
    for name, c in cands.items():
        path = folder / c["file"]
        assert file_sha256(path) == c["sha256"], name
        m = load_model(path, threads=1)
        assert m.meta.style == style, name
        if c["role"] == "pruned" and c["precision"] == "fp32":   # Li et al. 2017: whole filters removed, so fewer conv weights
            assert c["conv_weights"] < cands[c["parent_name"]]["conv_weights"], name
        if c["precision"] == "int8":
            assert_int8_convs(onnx.load(str(path)))
            twin = load_model(folder / cands[c["parent_name"]]["file"], threads=1)   # its fp32 twin
            assert ms_ssim(m.run(frame), twin.run(frame)) > 0.9, name   # Wang et al. 2003 MS-SSIM
