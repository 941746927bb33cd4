"""A flash limiter for the output, after WCAG 2.x success criterion 2.3.1 (Three
Flashes or Below Threshold) and its definitions of general and red flash thresholds.

Definitions used (WCAG 2.2, "general flash and red flash thresholds"; the red-flash
formula is from memory of the WCAG 2.2 definition and its notes):
- general flash: a pair of opposing changes in relative luminance of 10% or more of
  the maximum relative luminance (1.0), where the darker state is below 0.80;
- red flash: a pair of opposing transitions involving a saturated red, where a state
  is saturated red when R / (R + G + B) >= 0.8 and a transition is a change of more
  than 20 in (R - G - B) x 320 (negative values set to 0), R, G, B linear in [0, 1];
- at most three flashes of either kind in any one-second period, unless the flashing
  area is below 0.006 steradians (25% of any 10-degree visual field) at the viewing
  distance.

How it limits: every pixel keeps the level of its last extreme and the times of its
recent transitions. A pixel whose next transition would be the seventh in a second
(a fourth flash) is held just short of the threshold by blending it towards the
previous output in linear light, but only where such pixels cover more than the area
threshold in some 10-degree window at the show's viewing geometry; smaller flicker and
slow changes pass unchanged.
"""
from __future__ import annotations

import math
from collections import deque

import cv2
import numpy as np

LUM_STEP = 0.10        # 10% of maximum relative luminance
DARK_LIMIT = 0.80      # the darker state must be below this
RED_STEP = 20.0        # change in (R - G - B) x 320
RED_SATURATION = 0.8   # R / (R + G + B)
MAX_TRANSITIONS = 6    # three flashes = three pairs of opposing transitions
WINDOW_S = 1.0
AREA_SR = 0.006        # 25% of a 10-degree visual field
MARGIN = 0.90          # hold clamped pixels this fraction of a step from the threshold (8-bit rounding)

_LUT = np.array([(v / 255) / 12.92 if v / 255 <= 0.04045 else ((v / 255 + 0.055) / 1.055) ** 2.4
                 for v in range(256)], np.float32)


# linear light in 16-bit steps (float32 values 0..65535) and back: the clamped blend runs on
# whole frames, so it uses OpenCV table lookups instead of float powers (about 4 ms
# instead of 23 at 640x360 here)
_Q = (1 << 16) - 1
_LUT16 = (_LUT.astype(np.float64) * _Q).astype(np.float32)
_v = (np.arange(_Q + 1, dtype=np.float64) + 0.5) / _Q   # the centre of each truncated step
_INV16 = np.clip(np.round(np.where(_v <= 0.0031308, _v * 12.92, 1.055 * _v ** (1 / 2.4) - 0.055) * 255),
                 0, 255).astype(np.uint8)
del _v


def to_linear(img_bgr: np.ndarray) -> np.ndarray:
    return _LUT[img_bgr]


def blend_linear(prev_bgr: np.ndarray, new_bgr: np.ndarray, k: np.ndarray) -> np.ndarray:
    """prev + (new - prev) * k per pixel, in linear light; uint8 BGR in and out, k (H, W)
    float32 in [0, 1]. Within one 8-bit step of the float blend encoded by IEC 61966-2-1."""
    lin_prev = cv2.LUT(prev_bgr, _LUT16)
    lin_new = cv2.LUT(new_bgr, _LUT16)
    k = np.ascontiguousarray(k, np.float32)
    mixed = cv2.blendLinear(lin_new, lin_prev, k, 1.0 - k)
    return np.take(_INV16, mixed.astype(np.uint16))


def rel_luminance(lin_bgr: np.ndarray) -> np.ndarray:
    return 0.0722 * lin_bgr[..., 0] + 0.7152 * lin_bgr[..., 1] + 0.2126 * lin_bgr[..., 2]


def red_level(lin_bgr: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    b, g, r = lin_bgr[..., 0], lin_bgr[..., 1], lin_bgr[..., 2]
    level = np.maximum(0.0, (r - g - b) * 320.0)
    saturated = r >= RED_SATURATION * (r + g + b + 1e-9)
    return level, saturated


class _Channel:
    """Transition bookkeeping for one quantity (luminance or red level) per pixel."""

    def __init__(self, shape: tuple[int, int], step: float) -> None:
        self.step = step
        self.anchor: np.ndarray | None = None       # level at the last extreme
        self.direction = np.zeros(shape, np.int8)   # +1 rising, -1 falling, 0 none yet
        self.times: deque[tuple[float, np.ndarray]] = deque()  # (t, bool mask of transitions)
        self.counts = np.zeros(shape, np.int16)     # transitions per pixel in the window

    def recent_counts(self, now: float) -> np.ndarray:
        while self.times and now - self.times[0][0] >= WINDOW_S:
            self.counts -= self.times.popleft()[1]
        return self.counts

    def would_transition(self, level: np.ndarray, eligible: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(mask of transitions this level makes, their direction)."""
        if self.anchor is None:
            self.anchor = level.copy()
            return np.zeros(level.shape, bool), np.zeros(level.shape, np.int8)
        diff = level - self.anchor
        up = (diff >= self.step) & (self.direction <= 0)
        down = (-diff >= self.step) & (self.direction >= 0)
        trans = (up | down) & eligible
        return trans, np.where(up, 1, -1).astype(np.int8)

    def commit(self, level: np.ndarray, trans: np.ndarray, direc: np.ndarray, now: float) -> None:
        assert self.anchor is not None
        # follow the extreme in the current direction; restart it at a transition
        rising = self.direction > 0
        falling = self.direction < 0
        self.anchor = np.where(rising, np.maximum(self.anchor, level),
                               np.where(falling, np.minimum(self.anchor, level), self.anchor))
        self.anchor = np.where(trans, level, self.anchor)
        self.direction = np.where(trans, direc, self.direction)
        if trans.any():
            self.times.append((now, trans.copy()))
            self.counts += trans


class FlashLimiter:
    """Call with each output frame and its display time; returns the frame to show.

    The analysis runs on a copy at most `analysis_width` pixels wide (area-averaged),
    so the cost stays a few milliseconds; pixels_per_degree refers to the full frame."""

    def __init__(self, pixels_per_degree: float, enabled: bool = True, analysis_width: int = 160) -> None:
        self.full_ppd = pixels_per_degree
        self.ppd = pixels_per_degree
        self.analysis_width = analysis_width
        self.enabled = enabled
        self.prev_lin: np.ndarray | None = None
        self.lum: _Channel | None = None
        self.red: _Channel | None = None
        self.clamped_frames = 0

    def _area_exceeded(self, mask: np.ndarray) -> np.ndarray:
        """Pixels of `mask` inside some 10-degree window where the mask covers > 25% of
        the window's area... approximated with a square window of the same area."""
        if not mask.any():
            return mask
        area_px = AREA_SR * (180 / math.pi) ** 2 * self.ppd ** 2   # 25% of the 10-degree field
        side = max(1, int(round(math.sqrt(area_px / 0.25))))       # window holding that area at 25%
        h, w = mask.shape
        if area_px >= h * w:  # the whole screen is smaller than the threshold area
            return np.zeros_like(mask) if mask.sum() < area_px else mask
        frac = cv2.boxFilter(mask.astype(np.float32), -1, (min(side, w), min(side, h)),
                             normalize=True, borderType=cv2.BORDER_CONSTANT)
        cover = min(0.25, area_px / max(1, min(side, w) * min(side, h)))
        hot = frac > cover
        if not hot.any():
            return np.zeros_like(mask)
        near = cv2.dilate(hot.astype(np.uint8), np.ones((min(side, h), min(side, w)), np.uint8)) > 0
        return mask & near

    def __call__(self, frame_bgr: np.ndarray, now: float) -> np.ndarray:
        if not self.enabled:
            return frame_bgr
        h, w = frame_bgr.shape[:2]
        if w > self.analysis_width:
            sw = self.analysis_width
            sh = max(1, round(h * sw / w))
            small = cv2.resize(frame_bgr, (sw, sh), interpolation=cv2.INTER_AREA)
            self.ppd = self.full_ppd * sw / w
        else:
            small, self.ppd = frame_bgr, self.full_ppd
        lin = to_linear(small)
        if self.prev_lin is None or self.prev_lin.shape != lin.shape:
            self.prev_full = frame_bgr
            self.prev_lin = lin
            self.lum = _Channel(lin.shape[:2], LUM_STEP)
            self.red = _Channel(lin.shape[:2], RED_STEP)
            y = rel_luminance(lin)
            rl, sat0 = red_level(lin)
            self.prev_levels = (y, rl, sat0)
            self.lum.would_transition(y, np.ones(y.shape, bool))
            self.red.would_transition(rl, np.ones(y.shape, bool))
            return frame_bgr
        assert self.lum is not None and self.red is not None
        out_lin = lin
        y, (y_prev, rl_prev, sat_prev) = rel_luminance(lin), self.prev_levels
        rl, sat = red_level(lin)
        k = np.ones(y.shape, np.float32)
        for ch, level, prev_level, eligible, limit in (
                (self.lum, y, y_prev, np.minimum(y, self.lum.anchor) < DARK_LIMIT, LUM_STEP),
                (self.red, rl, rl_prev, sat | sat_prev, RED_STEP)):
            trans, direc = ch.would_transition(level, eligible)
            over = trans & (ch.recent_counts(now) >= MAX_TRANSITIONS)
            over = self._area_exceeded(over)
            if over.any():
                # hold short of the threshold: level_out = anchor + direc * step * MARGIN
                target = ch.anchor + direc * limit * MARGIN
                denom = level - prev_level
                safe = np.where(np.abs(denom) < 1e-9, 1e-9, denom)
                kk = np.clip((target - prev_level) / safe, 0.0, 1.0)
                k = np.where(over, np.minimum(k, kk), k)
        if self.prev_full.shape != frame_bgr.shape:
            # the resolution governor stepped between two sizes that share an analysis size:
            # the bookkeeping carries over, the previous output is rescaled for the blend
            self.prev_full = cv2.resize(self.prev_full, (w, h), interpolation=cv2.INTER_AREA)
        if (k < 1).any():
            self.clamped_frames += 1
            kf = k if k.shape == frame_bgr.shape[:2] else cv2.resize(k, (w, h), interpolation=cv2.INTER_NEAREST)
            out = blend_linear(self.prev_full, frame_bgr, kf)
            small_out = out if out.shape == small.shape else cv2.resize(out, (small.shape[1], small.shape[0]),
                                                                        interpolation=cv2.INTER_AREA)
            out_lin = to_linear(small_out)  # bookkeeping follows what is really shown
            y_out, (rl_out, sat_out) = rel_luminance(out_lin), red_level(out_lin)
        else:
            out = frame_bgr
            y_out, rl_out, sat_out = y, rl, sat
        for ch, level, eligible in ((self.lum, y_out, np.minimum(y_out, self.lum.anchor) < DARK_LIMIT),
                                    (self.red, rl_out, sat_out | sat_prev)):
            trans, direc = ch.would_transition(level, eligible)
            ch.commit(level, trans, direc, now)
        self.prev_lin = out_lin
        self.prev_levels = (y_out, rl_out, sat_out)
        self.prev_full = out
        return out
