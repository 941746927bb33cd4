"""Content sets for training, distillation and calibration.

`--content PATH...` accepts folders of images (recursive), single images, video files
(frames sampled evenly) and `scenes:N` (N procedurally generated scenes, see
limner.runtime.scenes). Unreadable files are skipped and counted. Every item keeps
the sha256 of its source file so later stages can refuse overlap between sets.
"""
from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np
from limner.runtime.errors import InputError
from limner.runtime.hashing import file_sha256
from limner.runtime.images import IMAGE_EXTS
from limner.runtime.scenes import scene

VIDEO_EXTS = {".mp4", ".avi", ".mov", ".mkv", ".webm", ".m4v"}


class ContentError(InputError):
    pass


@dataclass
class ContentItem:
    image: np.ndarray  # (H, W, 3) uint8 BGR
    source: str        # file path (with #frame for video) or scenes:seed
    sha256: str        # of the source file (video: of the video file)


@dataclass
class ContentSet:
    items: list[ContentItem]
    skipped: list[str]

    def hashes(self) -> list[str]:
        return sorted({i.sha256 for i in self.items})

    def sources(self) -> list[str]:
        return sorted({i.source.split("#")[0] for i in self.items})

    def groups(self) -> list[list[int]]:
        """Item indices by source (`source_of`), in first-seen order."""
        out: dict[str, list[int]] = {}
        for k, item in enumerate(self.items):
            out.setdefault(source_of(item.source), []).append(k)
        return list(out.values())


_NUMBERED = re.compile(r"^(.*)-\d+$")


def source_of(source: str) -> str:
    """The source an item was taken from: a video's frames (`clip.mp4#3`) share their file,
    and image files named STEM-N (N digits) in one folder share STEM, the way extracted
    frames and photo series are named (tree-0 ... tree-5 are frames of one video); anything
    else is its own source."""
    path = source.split("#")[0]
    if path.startswith("scenes:"):
        return path
    p = Path(path)
    m = _NUMBERED.match(p.stem)
    return str(p.with_name(m.group(1))) if m else path


def _video_frames(path: Path, frames_per_video: int) -> list[np.ndarray]:
    cap = cv2.VideoCapture(str(path))
    try:
        if not cap.isOpened():
            return []
        total = int(cap.get(cv2.CAP_PROP_FRAME_COUNT))
        out = []
        if total > 0:
            for idx in np.linspace(0, total - 1, min(frames_per_video, total)).astype(int):
                cap.set(cv2.CAP_PROP_POS_FRAMES, int(idx))
                ok, f = cap.read()
                if ok and f is not None:
                    out.append(f)
        return out
    finally:
        cap.release()


def _expand(spec: str) -> list[Path]:
    p = Path(spec)
    if p.is_dir():
        return sorted(f for f in p.rglob("*") if f.is_file() and f.suffix.lower() in IMAGE_EXTS | VIDEO_EXTS)
    if p.is_file():
        return [p]
    raise ContentError(f"{spec}: no such file or folder")


def load_content(specs: list[str], *, min_items: int = 1, min_side: int = 64,
                 frames_per_video: int = 50, max_side: int = 1024) -> ContentSet:
    """Read every spec; images larger than max_side are downscaled (keeps memory bounded)."""
    if not specs:
        raise ContentError("no content given: pass --content with image folders, images or videos")
    items: list[ContentItem] = []
    skipped: list[str] = []
    for spec in specs:
        if spec.startswith("scenes:"):
            try:
                n = int(spec.split(":", 1)[1])
            except ValueError:
                raise ContentError(f"{spec}: expected scenes:N with N a count") from None
            for seed in range(n):
                img = scene(seed, 512, 384)
                items.append(ContentItem(img, f"scenes:{seed}",
                                         hashlib.sha256(f"limner-scene:{seed}".encode()).hexdigest()))
            continue
        for f in _expand(spec):
            ext = f.suffix.lower()
            if ext in VIDEO_EXTS:
                frames = _video_frames(f, frames_per_video)
                if not frames:
                    skipped.append(str(f))
                    continue
                sha = file_sha256(f)
                items += [ContentItem(_fit(fr, max_side), f"{f}#{i}", sha) for i, fr in enumerate(frames)]
                continue
            img = cv2.imread(str(f), cv2.IMREAD_COLOR)
            if img is None:
                skipped.append(str(f))
                continue
            items.append(ContentItem(_fit(img, max_side), str(f), file_sha256(f)))
    small = [i.source for i in items if min(i.image.shape[:2]) < min_side]
    items = [i for i in items if min(i.image.shape[:2]) >= min_side]
    skipped += small
    if len(items) < min_items:
        raise ContentError(f"content set has {len(items)} usable image(s) (need at least {min_items}; "
                           f"{len(skipped)} skipped as unreadable or smaller than {min_side} px)")
    return ContentSet(items, skipped)


def _fit(img: np.ndarray, max_side: int) -> np.ndarray:
    h, w = img.shape[:2]
    s = max(h, w)
    if s <= max_side:
        return img
    k = max_side / s
    return cv2.resize(img, (round(w * k), round(h * k)), interpolation=cv2.INTER_AREA)


def sample_batch(cs: ContentSet, rng: np.random.Generator, batch: int, size: int,
                 jitter: bool = True) -> np.ndarray:
    """Random crops (scale jitter, flips, mild colour jitter) -> (B, size, size, 3) uint8 RGB."""
    out = np.empty((batch, size, size, 3), np.uint8)
    for b in range(batch):
        img = cs.items[int(rng.integers(len(cs.items)))].image
        h, w = img.shape[:2]
        # crop side between size and the short side (scale jitter), then resize to `size`
        short = min(h, w)
        lo = min(size, short)
        side = int(rng.integers(lo, max(lo, int(short * 0.9)) + 1)) if jitter else lo
        y = int(rng.integers(0, h - side + 1))
        x = int(rng.integers(0, w - side + 1))
        crop = img[y:y + side, x:x + side]
        crop = cv2.resize(crop, (size, size), interpolation=cv2.INTER_AREA if side > size else cv2.INTER_LINEAR)
        if jitter:
            crop = _jitter(crop, rng)
        out[b] = crop[:, :, ::-1]  # BGR -> RGB
    return out


def _jitter(img: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Flip, brightness / contrast and saturation jitter of a BGR uint8 image."""
    if rng.random() < 0.5:
        img = img[:, ::-1]
    f = img.astype(np.float32)
    gain = rng.uniform(0.85, 1.15)          # brightness / contrast
    bias = rng.uniform(-12, 12)
    grey = f.mean(axis=2, keepdims=True)
    sat = rng.uniform(0.8, 1.2)             # saturation
    f = (grey + (f - grey) * sat) * gain + bias
    return np.clip(f, 0, 255).astype(np.uint8)


def camera_augment(img: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """What a camera does to a scene, drawn at random (BGR uint8 in and out): exposure
    (gain 0.7-1.3), white balance (blue and red gains 0.85-1.15 against green), motion
    blur (a 3-9 px line in a random direction, 30% of frames), sensor noise (Gaussian,
    sigma 0-4 grey levels) and JPEG compression (quality 40-95, 50% of frames). Ranges
    are common practice for camera augmentation, no source; chosen to span a webcam's."""
    f = img.astype(np.float32)
    gain = rng.uniform(0.7, 1.3)
    wb = np.array([rng.uniform(0.85, 1.15), 1.0, rng.uniform(0.85, 1.15)], np.float32)
    f *= gain * wb
    if rng.random() < 0.3:
        n = int(rng.integers(3, 10))
        k = np.zeros((n, n), np.float32)
        a = rng.uniform(0, np.pi)
        c, dx, dy = (n - 1) / 2, np.cos(a), np.sin(a)
        for t in np.linspace(-c, c, 2 * n):
            k[int(round(c + t * dy)), int(round(c + t * dx))] = 1.0
        f = cv2.filter2D(f, -1, k / k.sum(), borderType=cv2.BORDER_REFLECT)
    f += rng.normal(0, rng.uniform(0, 4), f.shape).astype(np.float32)
    out = np.clip(f, 0, 255).round().astype(np.uint8)
    if rng.random() < 0.5:
        ok, buf = cv2.imencode(".jpg", out, [cv2.IMWRITE_JPEG_QUALITY, int(rng.integers(40, 96))])
        out = cv2.imdecode(buf, cv2.IMREAD_COLOR)
    return out


@dataclass(frozen=True)
class FrameVariety:
    """Scene variety beyond what a camera does, for distillation frames (the teacher labels
    any input, so a student can be shown more kinds of scene than the sources hold). All off
    by default; ranges are ours to choose (common practice for augmentation, no source)."""
    rotate_deg: float = 0.0   # window turned by up to +-this many degrees (new edge directions)
    hue_deg: float = 0.0      # hue turned by up to +-this many degrees (new colours)
    mosaic: float = 0.0       # share of frames made of two sources, side by side or stacked
    zoom_min: float = 0.5     # smallest window, as a share of the largest that fits
    by_source: bool = False   # draw a source first, then one of its items (ContentSet.groups)

    def __post_init__(self) -> None:
        for name, lo, hi in (("rotate_deg", 0, 45), ("hue_deg", 0, 180), ("mosaic", 0, 1),
                             ("zoom_min", 0.1, 1)):
            if not lo <= getattr(self, name) <= hi:
                raise InputError(f"variety.{name}={getattr(self, name)}: must be between {lo} and {hi}")

    def describe(self) -> str:
        """'' when all off (so caches built before variety existed keep their keys)."""
        return "" if self == FrameVariety() else \
            f"rot{self.rotate_deg}:hue{self.hue_deg}:mos{self.mosaic}:zoom{self.zoom_min}" + \
            (":by-source" if self.by_source else "")


def _window(img: np.ndarray, rng: np.random.Generator, width: int, height: int,
            v: FrameVariety) -> np.ndarray:
    """A random window of the frame's aspect, turned by up to v.rotate_deg, resampled to
    width x height; the turned window lies wholly inside the image (no empty corners)."""
    h, w = img.shape[:2]
    zoom = rng.uniform(v.zoom_min, 1.0)
    if not v.rotate_deg:
        k = min(w / width, h / height) * zoom
        ww, wh = max(1, round(width * k)), max(1, round(height * k))
        y = int(rng.integers(0, h - wh + 1))
        x = int(rng.integers(0, w - ww + 1))
        win = img[y:y + wh, x:x + ww]
        interp = cv2.INTER_AREA if ww > width else cv2.INTER_LINEAR
        return cv2.resize(win, (width, height), interpolation=interp)
    a = np.radians(rng.uniform(-v.rotate_deg, v.rotate_deg))
    ca, sa = np.cos(a), np.sin(a)
    c, s = abs(ca), abs(sa)
    bw, bh = width * c + height * s, width * s + height * c   # the turned frame's bounding box
    k = min(w / bw, h / bh) * zoom                            # source pixels per output pixel
    img = cv2.resize(img, (max(1, int(w / k)), max(1, int(h / k))),
                     interpolation=cv2.INTER_AREA if k > 1 else cv2.INTER_LINEAR)
    h, w = img.shape[:2]
    cx = rng.uniform(min(bw / 2, w / 2), max(w - bw / 2, w / 2))
    cy = rng.uniform(min(bh / 2, h / 2), max(h - bh / 2, h / 2))
    # output pixel (u, v) reads source R(a) (u - width/2, v - height/2) + (cx, cy)
    m = np.array([[ca, -sa, cx - ca * width / 2 + sa * height / 2],
                  [sa, ca, cy - sa * width / 2 - ca * height / 2]], np.float64)
    return cv2.warpAffine(img, m, (width, height), flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP,
                          borderMode=cv2.BORDER_REFLECT)


def _turn_hue(img: np.ndarray, deg: float) -> np.ndarray:
    """BGR uint8 with its hue turned by `deg` degrees (OpenCV's 8-bit hue is degrees / 2)."""
    hsv = cv2.cvtColor(img, cv2.COLOR_BGR2HSV)
    hsv[:, :, 0] = ((hsv[:, :, 0].astype(np.int32) + int(round(deg / 2))) % 180).astype(np.uint8)
    return cv2.cvtColor(hsv, cv2.COLOR_HSV2BGR)


def _draw(cs: ContentSet, rng: np.random.Generator, groups: list[list[int]] | None) -> np.ndarray:
    """One item's image: uniform over items, or (given `groups`) over sources and then their items."""
    if groups is None:
        return cs.items[int(rng.integers(len(cs.items)))].image
    g = groups[int(rng.integers(len(groups)))]
    return cs.items[g[int(rng.integers(len(g)))]].image


def sample_frame(cs: ContentSet, rng: np.random.Generator, width: int, height: int,
                 camera: bool = False, variety: FrameVariety | None = None) -> np.ndarray:
    """A camera-like frame: a random window of the frame's aspect (zoom_min-100% of the
    largest that fits, 50% by default), resized to width x height, jittered (and, with
    `camera`, put through camera_augment). `variety` may turn the window, turn its hue, or
    make the frame of two sources split along a random line, and draw by source rather than
    by item -> (height, width, 3) uint8 BGR."""
    v = variety or FrameVariety()
    groups = cs.groups() if v.by_source else None
    frame = _window(_draw(cs, rng, groups), rng, width, height, v)
    if v.mosaic and rng.random() < v.mosaic:
        other = _window(_draw(cs, rng, groups), rng, width, height, v)
        if rng.random() < 0.5:
            x = 8 * int(rng.integers(-(-width // 32), 3 * width // 32 + 1))    # 25-75% across
            frame[:, x:] = other[:, x:]
        else:
            y = 8 * int(rng.integers(-(-height // 32), 3 * height // 32 + 1))
            frame[y:] = other[y:]
    if v.hue_deg:
        frame = _turn_hue(frame, rng.uniform(-v.hue_deg, v.hue_deg))
    frame = _jitter(frame, rng)
    return np.ascontiguousarray(camera_augment(frame, rng) if camera else frame)
