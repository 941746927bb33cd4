"""`limner capture`: record venue frames (the real camera, light and scene) for
distillation and calibration. Writes only when run, only into the folder given."""
from __future__ import annotations

import os
from pathlib import Path

import cv2

from .errors import InputError
from .images import write_image
from .outputs import check_out_folder
from .progress import Progress
from .sources import open_source


def capture(source: str | None, frames: int, out: Path, every: int = 1, quality: int = 95) -> list[Path]:
    """Save `frames` frames (every `every`-th frame read) as JPEGs named frame_000001.jpg ...
    Ctrl-C or SIGTERM ends a capture normally: the frames written so far are kept and returned
    (each file is written atomically, so none is left half-written)."""
    if frames < 1:
        raise InputError(f"--frames {frames}: must be at least 1")
    if every < 1:
        raise InputError(f"--every {every}: must be at least 1")
    out = Path(out)
    check_out_folder(out)
    src = open_source(source)  # a missing camera or unreadable file fails before out is made
    created = not out.exists()
    out.mkdir(parents=True, exist_ok=True)
    existing = sorted(out.glob("frame_*.jpg"))
    start = int(existing[-1].stem.split("_")[1]) + 1 if existing else 1
    written: list[Path] = []
    bar = Progress(frames, "capture")
    try:
        n = 0
        while len(written) < frames:
            ok, frame = src.read()
            if not ok or frame is None:
                break
            n += 1
            if (n - 1) % every:
                continue
            path = out / f"frame_{start + len(written):06d}.jpg"
            try:
                write_image(path, frame, [cv2.IMWRITE_JPEG_QUALITY, quality])
            except OSError as e:
                why = os.strerror(e.errno).lower() if e.errno else str(e)
                kept = f"; the {len(written)} frame(s) before it are kept" if written else ""
                raise InputError(f"{path}: cannot write the frame: {why}{kept}") from None
            written.append(path)
            bar.update(1)
    except KeyboardInterrupt:  # the operator's way to end a capture from a camera
        pass
    finally:
        src.release()
        bar.close()
        if created and not written:  # nothing captured (an empty file, a camera gone): no empty folder
            try:
                out.rmdir()
            except OSError:
                pass
    return written
