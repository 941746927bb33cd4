"""The shared command line of the teacher-against-model report tools (tools/scale_report.py,
tools/gap_report.py): a teacher, the models to compare with it, held-out photos cover-cropped
to one resolution, and an optional JSON record."""
from __future__ import annotations

import argparse
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from limner.bench.run import display_names
from limner.runtime.images import cover_crop, list_images, read_image
from limner.runtime.model import Model, load_model


@dataclass
class CompareInputs:
    teacher_path: Path
    teacher: Model
    models: list[tuple[str, Model]]   # display name (FOLDER/NAME where two share a name), model
    photos: list[np.ndarray]          # (H, W, 3) uint8 BGR at `resolution`
    resolution: str
    json_path: Path | None

    def write_json(self, rows: dict) -> None:
        """Save the rows with what they were measured on (no file without --json)."""
        if self.json_path is None:
            return
        self.json_path.parent.mkdir(parents=True, exist_ok=True)
        self.json_path.write_text(json.dumps({"teacher": str(self.teacher_path), "photos": len(self.photos),
                                              "resolution": self.resolution, "rows": rows}, indent=2) + "\n")


def parse(doc: str, argv: list[str] | None = None) -> CompareInputs:
    ap = argparse.ArgumentParser(description=doc, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("teacher", type=Path)
    ap.add_argument("models", nargs="+", type=Path)
    ap.add_argument("--content", nargs="+", required=True, help="held-out photos or folders")
    ap.add_argument("--resolution", default="640x360", help="WIDTHxHEIGHT")
    ap.add_argument("--json", type=Path, help="also write the rows here")
    a = ap.parse_args(argv)
    try:
        w, h = (int(v) for v in a.resolution.lower().split("x"))
    except ValueError:
        ap.error(f"--resolution {a.resolution!r}: expected WIDTHxHEIGHT, e.g. 640x360")
    try:
        photos = [cover_crop(read_image(p), w, h) for p in list_images(a.content)]
        models = [load_model(p) for p in a.models]
        teacher = load_model(a.teacher)
    except (OSError, ValueError) as e:
        ap.error(str(e))
    if not photos:
        ap.error(f"no photos in {' '.join(a.content)}")
    return CompareInputs(a.teacher, teacher, list(zip(display_names(models), models)),
                         photos, a.resolution, a.json)
