"""The flash limiter against crafted strobes, counted with an independent implementation
of WCAG 2.x's definitions (success criterion 2.3.1 and the "general flash and red flash
thresholds" definition; the red formula from memory of WCAG 2.2's definition)."""
from __future__ import annotations

import numpy as np
import pytest

from limner.runtime.flash import FlashLimiter

FPS = 60.0


def _lin(v):
    v = np.asarray(v, np.float64) / 255
    return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)


def luminance(frame):  # WCAG relative luminance of the field's mean colour (uniform fields)
    b, g, r = (_lin(frame[..., c]).mean() for c in range(3))
    return 0.2126 * r + 0.7152 * g + 0.0722 * b


def red(frame):
    b, g, r = (_lin(frame[..., c]).mean() for c in range(3))
    return max(0.0, (r - g - b) * 320), r >= 0.8 * (r + g + b + 1e-12)


def max_flashes_per_second(levels, times, step, eligible):
    """Transitions between successive extremes of at least `step` (with `eligible`
    deciding whether a pair of states can flash); a flash is a pair of opposing
    transitions; returns the most flashes in any one-second window."""
    trans, anchor, direction = [], levels[0], 0
    for i in range(1, len(levels)):
        v = levels[i]
        if direction >= 0 and anchor - v >= step and eligible(v, anchor):
            trans.append(times[i]); direction, anchor = -1, v
        elif direction <= 0 and v - anchor >= step and eligible(v, anchor):
            trans.append(times[i]); direction, anchor = 1, v
        elif direction > 0:
            anchor = max(anchor, v)
        elif direction < 0:
            anchor = min(anchor, v)
    return max((sum(1 for u in trans if t <= u < t + 1.0) // 2 for t in trans), default=0)


def _strobe(bright, dark, n=180, hz=10.0):
    half = FPS / hz / 2
    return [bright if int(i // half) % 2 == 0 else dark for i in range(n)]


def _run(frames, ppd=19.0):
    lim = FlashLimiter(ppd)
    return [lim(f, i / FPS) for i, f in enumerate(frames)]


def _general(frames):
    lv = [luminance(f) for f in frames]
    return max_flashes_per_second(lv, [i / FPS for i in range(len(lv))], 0.10,
                                  lambda a, b: min(a, b) < 0.80)


def _red(frames):
    lv = [red(f) for f in frames]
    lev = [l for l, _ in lv]
    sat = [s for _, s in lv]
    return max_flashes_per_second(lev, [i / FPS for i in range(len(lev))], 20.0, lambda a, b: True) \
        if any(sat) else 0


def test_full_field_black_white_strobe_is_limited():
    white = np.full((90, 160, 3), 255, np.uint8)
    black = np.zeros_like(white)
    frames = _strobe(white, black)
    assert _general(frames) >= 9          # the input: a 10 Hz strobe
    assert _general(_run(frames)) <= 3    # WCAG 2.3.1: no more than three in any second


def test_saturated_red_strobe_is_limited():
    red_f = np.zeros((90, 160, 3), np.uint8)
    red_f[..., 2] = 255
    black = np.zeros_like(red_f)
    frames = _strobe(red_f, black)
    assert _red(frames) >= 9
    out = _run(frames)
    assert _red(out) <= 3 and _general(out) <= 3


def test_strobe_below_area_threshold_passes_unchanged():
    # 40x40 px at 19 px/degree is ~4.4 square degrees, under 0.006 sr (~19.7 square degrees)
    frames = []
    for i in range(180):
        f = np.full((360, 640, 3), 128, np.uint8)
        if int(i // 3) % 2 == 0:
            f[:40, :40] = 255
        frames.append(f)
    assert all(np.array_equal(a, b) for a, b in zip(frames, _run(frames)))


def test_slow_fade_passes_unchanged():
    frames = [np.full((90, 160, 3), min(255, 2 * i), np.uint8) for i in range(180)]
    assert all(np.array_equal(a, b) for a, b in zip(frames, _run(frames)))


@pytest.mark.parametrize("hz", [2.0, 2.5])  # exactly 3 Hz sits on the limit and may be held
def test_slow_blinking_is_left_alone(hz):
    white = np.full((90, 160, 3), 255, np.uint8)
    black = np.zeros_like(white)
    frames = _strobe(white, black, n=240, hz=hz)
    assert all(np.array_equal(a, b) for a, b in zip(frames, _run(frames)))


def test_clamped_blend_is_a_linear_light_mix():
    """The clamped blend mixes in linear light: sRGB decoding and encoding per IEC 61966-2-1
    (the piecewise formulas, computed here in float64), to within one 8-bit step."""
    from limner.runtime.flash import blend_linear

    rng = np.random.default_rng(3)
    a = rng.integers(0, 256, (48, 64, 3), np.uint8)
    b = rng.integers(0, 256, (48, 64, 3), np.uint8)
    k = rng.random((48, 64)).astype(np.float32)
    k[:4], k[4:8] = 0.0, 1.0
    mix = _lin(a) + (_lin(b) - _lin(a)) * k[..., None]
    enc = np.where(mix <= 0.0031308, mix * 12.92, 1.055 * mix ** (1 / 2.4) - 0.055)
    want = np.clip(np.round(enc * 255), 0, 255)
    got = blend_linear(a, b, k)
    assert np.abs(got.astype(int) - want).max() <= 1
    assert (got[:4] == a[:4]).all() and (got[4:8] == b[4:8]).all()


def test_resolution_step_during_a_clamped_strobe_keeps_limiting():
    """The governor steps 480x264 -> 320x176 (both analysed at 160x88) mid-strobe: the
    limiter goes on (it used to crash blending frames of two sizes) and the whole run still
    stays within three flashes a second by the independent WCAG count above."""
    big = [np.full((264, 480, 3), v, np.uint8) for v in (255, 0)]
    small = [np.full((176, 320, 3), v, np.uint8) for v in (255, 0)]
    lim = FlashLimiter(19.0)
    shown = []
    for i in range(120):
        src = big if i < 11 or 60 <= i < 80 else small
        out = lim(src[i % 2], i / FPS)
        assert out.shape == src[0].shape
        shown.append(np.full((8, 8, 3), out.mean(axis=(0, 1)), np.float64).round().astype(np.uint8))
    assert lim.clamped_frames > 0
    assert _general(shown) <= 3
