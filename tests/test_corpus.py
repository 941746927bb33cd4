"""The bundled real-photo corpus: split by source image, every file recorded with its
licence, nothing of the excluded kinds, and the bundled models never saw held-out data."""
from __future__ import annotations

import re

import cv2

from limner.runtime.bundled import CALIB_PHOTOS, HELD_OUT_PHOTOS, PHOTOS, STREET_CLIP, TRAIN_PHOTOS
from limner.runtime.hashing import file_sha256

SPLITS = {"train": TRAIN_PHOTOS, "calib": CALIB_PHOTOS, "heldout": HELD_OUT_PHOTOS}


def _sources_table() -> dict[str, tuple[str, str]]:
    """file -> (source id, licence) from SOURCES.md's table."""
    rows = {}
    for line in (PHOTOS / "SOURCES.md").read_text().splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) == 6 and re.match(r"(train|calib|heldout)/", cells[0]):
            rows[cells[0]] = (cells[3], cells[4])
    return rows


def test_every_photo_is_recorded_with_source_and_licence():
    table = _sources_table()
    files = {f"{s}/{p.name}" for s, d in SPLITS.items() for p in d.glob("*.jpg")}
    assert files and files == set(table), files ^ set(table)
    for f, (src, lic) in table.items():
        assert src and lic, f
        img = cv2.imread(str(PHOTOS / f))
        assert img is not None and max(img.shape[:2]) <= 640, f


def test_splits_share_no_source_image():
    table = _sources_table()
    by_split: dict[str, set[str]] = {}
    for f, (src, _) in table.items():
        by_split.setdefault(f.split("/")[0], set()).add(src)
    assert set(by_split) == set(SPLITS)
    assert not by_split["train"] & by_split["heldout"]
    assert not by_split["train"] & by_split["calib"]
    assert not by_split["calib"] & by_split["heldout"]


def test_no_people_logos_or_artworks_by_name():
    """The names the corpus issue excludes (people, a company's product) are gone from the
    assets, and the opencv-doc files the SOURCES.md leaves out are not bundled."""
    banned = ("astronaut", "grace_hopper", "rocket", "messi", "starry_night", "logo", "basketball",
              "graf", "smarties", "licenseplate", "megamind", "suzanne", "happyfish")
    names = [p.name.lower() for p in PHOTOS.rglob("*") if p.is_file()]
    assert not [n for n in names if any(b in n for b in banned)]


def test_street_clip_is_bundled_and_real():
    cap = cv2.VideoCapture(str(STREET_CLIP))
    n, w, h = int(cap.get(cv2.CAP_PROP_FRAME_COUNT)), cap.get(cv2.CAP_PROP_FRAME_WIDTH), cap.get(cv2.CAP_PROP_FRAME_HEIGHT)
    ok, f = cap.read()
    cap.release()
    assert ok and (w, h) == (640, 360) and n >= 100
    assert f.std() > 20  # a real scene, not a blank frame


def test_bundled_models_never_saw_held_out_or_calibration_photos():
    from limner.runtime.bundled import MODELS
    from limner.runtime.model import load_model

    held = {file_sha256(p) for p in HELD_OUT_PHOTOS.glob("*.jpg")} | {file_sha256(STREET_CLIP)}
    calib = {file_sha256(p) for p in CALIB_PHOTOS.glob("*.jpg")}
    for path in sorted(MODELS.glob("*.onnx")):
        m = load_model(path, threads=1)
        seen = set(m.meta.data_sha256)
        assert not seen & held, path
        assert not seen & calib, path
