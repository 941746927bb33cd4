"""Scene variety for distillation frames (compress/content.py FrameVariety): turned windows,
turned hues and two-source mosaics, each checked against OpenCV as the reference."""
from __future__ import annotations

import cv2
import numpy as np
import pytest
from limner.compress.content import ContentItem, ContentSet, FrameVariety, sample_frame


def _flat(bgr: tuple[int, int, int], h: int = 400, w: int = 600) -> np.ndarray:
    return np.full((h, w, 3), bgr, np.uint8)


def _set(*images: np.ndarray) -> ContentSet:
    return ContentSet([ContentItem(im, f"img{i}", f"sha{i}") for i, im in enumerate(images)], [])


def _stripe_angle(img: np.ndarray) -> float:
    """Dominant stripe direction in degrees from the horizontal, from the structure tensor of
    OpenCV Sobel gradients (the gradient is normal to the stripes); common practice, no source."""
    g = cv2.cvtColor(img, cv2.COLOR_BGR2GRAY).astype(np.float64)
    gx, gy = cv2.Sobel(g, cv2.CV_64F, 1, 0), cv2.Sobel(g, cv2.CV_64F, 0, 1)
    sxx, syy, sxy = (gx * gx).sum(), (gy * gy).sum(), (gx * gy).sum()
    normal = 0.5 * np.degrees(np.arctan2(2 * sxy, sxx - syy))    # gradient direction
    return (normal - 90 + 90) % 180 - 90                          # stripes run at normal - 90


def test_turned_windows_stay_within_the_angle_and_inside_the_image():
    stripes = np.where((np.arange(900)[:, None] // 8) % 2 == 0, 100, 200).astype(np.uint8)
    img = np.repeat(np.repeat(stripes, 1200, axis=1)[:, :, None], 3, axis=2)      # horizontal
    data = _set(img)
    plain = [_stripe_angle(sample_frame(data, np.random.default_rng(k), 320, 180)) for k in range(6)]
    assert max(abs(a) for a in plain) < 0.5
    v = FrameVariety(rotate_deg=30)
    frames = [sample_frame(data, np.random.default_rng(k), 320, 180, variety=v) for k in range(16)]
    angles = [_stripe_angle(f) for f in frames]
    assert max(abs(a) for a in angles) <= 31 and max(angles) - min(angles) > 15
    # no empty corners: the darkest stripe (100, after jitter of gain >= 0.85 and bias >= -12)
    # stays far above black
    assert min(int(f.min()) for f in frames) > 50


def test_hue_turn_follows_the_hsv_hue_circle():
    """Red (hue 0) turned by 120 degrees is green and by 240 blue: the HSV hue circle
    (Smith 1978), read back with OpenCV's BGR->HSV conversion."""
    from limner.compress.content import _turn_hue

    red = _flat((0, 0, 200), 8, 8)
    assert np.abs(_turn_hue(red, 120).astype(int) - (0, 200, 0)).max() <= 2
    assert np.abs(_turn_hue(red, 240).astype(int) - (200, 0, 0)).max() <= 2
    data = _set(_flat((40, 60, 200)))
    src = int(cv2.cvtColor(data.items[0].image[:1, :1], cv2.COLOR_BGR2HSV)[0, 0, 0]) * 2
    turns = []
    for k in range(16):
        f = sample_frame(data, np.random.default_rng(k), 160, 96, variety=FrameVariety(hue_deg=45))
        hue = int(np.median(cv2.cvtColor(f, cv2.COLOR_BGR2HSV)[:, :, 0])) * 2
        turns.append((hue - src + 180) % 360 - 180)
    assert max(abs(t) for t in turns) <= 45 + 4 and max(turns) - min(turns) > 20


def test_mosaic_frames_join_two_sources_along_one_line():
    data = _set(_flat((200, 40, 40)), _flat((40, 40, 200)))                     # blue, red
    mixed = 0
    for k in range(24):
        f = sample_frame(data, np.random.default_rng(k), 320, 176, variety=FrameVariety(mosaic=1.0))
        blue = f[:, :, 0] > f[:, :, 2]                                          # (176, 320)
        if blue.all() or not blue.any():
            continue                                    # both windows from one source
        mixed += 1
        cols, rows = blue.all(axis=0) | ~blue.any(axis=0), blue.all(axis=1) | ~blue.any(axis=1)
        if cols.all():   # side by side: one switch between columns, on the 8-pixel grid
            x = int(np.flatnonzero(np.diff(blue[0].astype(int)))[0]) + 1
            assert x % 8 == 0 and 0.25 * 320 <= x <= 0.75 * 320
        else:            # stacked
            assert rows.all()
            y = int(np.flatnonzero(np.diff(blue[:, 0].astype(int)))[0]) + 1
            assert y % 8 == 0 and 0.25 * 176 <= y <= 0.75 * 176
    assert mixed >= 6
    assert all(sample_frame(data, np.random.default_rng(k), 320, 176).std(axis=(0, 1)).max() < 1
               for k in range(6))                       # off by default: one source per frame


def test_variety_changes_the_cache_key_and_bad_values_are_named():
    from limner.compress.distill import cache_key
    from limner.compress.recipe import Recipe

    data = _set(_flat((1, 2, 3)))
    plain = cache_key(Recipe(), data, "t")
    assert "rot" not in plain                       # caches built before variety keep their key
    assert cache_key(Recipe(variety=FrameVariety(hue_deg=10)), data, "t") != plain
    with pytest.raises(ValueError, match="variety.mosaic=1.5"):
        FrameVariety(mosaic=1.5)
    with pytest.raises(ValueError, match="variety.rotate_deg=90"):
        FrameVariety(rotate_deg=90)


def test_drawing_by_source_gives_each_source_an_equal_share():
    """Six frames of one clip and two single photos: drawn by item the clip fills 6/8 of the
    frames, drawn by source 1/3. 600 draws: a binomial share's standard deviation is at most
    0.02, so +-0.07 is over three of them (common practice, no source)."""
    from limner.compress.content import source_of

    colours = [(200, 0, 0)] * 6 + [(0, 200, 0), (0, 0, 200)]
    names = [f"clips/tree-{k}.jpg" for k in range(6)] + ["photos/apple.jpg", "photos/dog.jpg"]
    data = ContentSet([ContentItem(_flat(c, 64, 96), n, f"sha{i}")
                       for i, (c, n) in enumerate(zip(colours, names))], [])
    assert [len(g) for g in data.groups()] == [6, 1, 1]
    assert source_of("clips/tree-3.jpg") == "clips/tree" and source_of("v.mp4#12") == "v.mp4"
    assert source_of("photos/aero1.jpg") == "photos/aero1.jpg"    # no hyphen: its own source

    def clip_share(v: FrameVariety) -> float:
        frames = [sample_frame(data, np.random.default_rng(k), 32, 24, variety=v) for k in range(600)]
        return float(np.mean([f[:, :, 0].mean() > f[:, :, 1:].mean() + 50 for f in frames]))

    assert abs(clip_share(FrameVariety()) - 6 / 8) < 0.07
    assert abs(clip_share(FrameVariety(by_source=True)) - 1 / 3) < 0.07
    from limner.compress.distill import cache_key
    from limner.compress.recipe import Recipe
    assert cache_key(Recipe(variety=FrameVariety(by_source=True)), data, "t").endswith("by-source")
