"""Bundle a finished compression run as a style's ladder, the same way for every style.

    python tools/bundle_ladder.py runs/ember-ladder --style ember --default tiny4-ctx

replaces runtime/assets/candidates/STYLE/ with the run's models, manifest.json,
recipe.toml and compress.log (no training files: the package holds what runs), keeps each
distilled network's weights (no optimizer state) in work/STYLE-ladder/students/NAME.pt so a
later recipe can warm-start from them (`init`), and with --default copies that candidate
to runtime/assets/models/default.onnx, the live default.

    python tools/bundle_ladder.py runs/ember-long-half6 --style ember --add

adds a later run's models to the bundled ladder instead (same teacher, no name shared with a
bundled candidate): its manifest entries join the ladder's, and its recipe, log, splits and
int8 probe are kept as recipe-RUN.toml, compress-RUN.log and the manifest's `added` list, so a
ladder grown over several runs still says where each rung came from.
"""
from __future__ import annotations

import argparse
import json
import shutil
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("run", type=Path, help="a finished `limner compress` output folder")
    ap.add_argument("--style", required=True, help="bundled style name")
    ap.add_argument("--default", metavar="NAME", help="candidate to copy to the live default")
    ap.add_argument("--add", action="store_true", help="add the run's models to the bundled ladder "
                    "instead of replacing it")
    a = ap.parse_args(argv)
    from limner.compress import checkpoint as ck

    manifest_path = a.run / "manifest.json"
    if not manifest_path.is_file():
        ap.error(f"{manifest_path}: missing (is the run finished?)")
    manifest = json.loads(manifest_path.read_text())
    cands = manifest["candidates"]
    if a.default and a.default not in cands:
        ap.error(f"--default {a.default}: not a candidate of {a.run} ({', '.join(sorted(cands))})")
    files = [a.run / c["file"] for c in cands.values()]
    missing = [str(f) for f in files if not f.is_file()]
    if missing:
        ap.error(f"missing model files: {', '.join(missing)}")
    dest = REPO / "runtime" / "assets" / "candidates" / a.style
    if a.add:
        _add(ap, a.run, manifest, files, dest)
    else:
        if dest.exists():
            shutil.rmtree(dest)
        dest.mkdir(parents=True)
        for f in files + [manifest_path, a.run / "recipe.toml", a.run / "compress.log"]:
            shutil.copy(f, dest / f.name)
    students = REPO / "work" / f"{a.style}-ladder" / "students"
    students.mkdir(parents=True, exist_ok=True)
    for name in cands:
        p = a.run / "work" / name / "checkpoint.pt"
        if p.is_file():
            c = ck.load(p)
            ck.save(ck.weights_only(c), students / f"{name}.pt")
    if a.default:
        shutil.copy(dest / cands[a.default]["file"], REPO / "runtime" / "assets" / "models" / "default.onnx")
    print(f"bundled {len(cands)} candidate(s) in {dest.relative_to(REPO)}; weights in "
          f"{students.relative_to(REPO)}" + (f"; live default: {a.default}" if a.default else ""))
    return 0


def _add(ap: argparse.ArgumentParser, run: Path, manifest: dict, files: list[Path], dest: Path) -> None:
    """Merge a run into the bundled ladder at `dest`; the manifest is written last, so a
    failure leaves model files the manifest does not name, never a manifest naming missing ones."""
    ladder_path = dest / "manifest.json"
    if not ladder_path.is_file():
        ap.error(f"--add: {ladder_path} missing: bundle a ladder first (without --add)")
    ladder = json.loads(ladder_path.read_text())
    if ladder["teacher"]["sha256"] != manifest["teacher"]["sha256"]:
        ap.error(f"--add: {run} was distilled from teacher {manifest['teacher']['sha256'][:16]}..., "
                 f"the bundled ladder from {ladder['teacher']['sha256'][:16]}...")
    shared = sorted(set(manifest["candidates"]) & set(ladder["candidates"]))
    if shared:
        ap.error(f"--add: {', '.join(shared)} already in {dest}: rename them in the recipe or "
                 f"bundle without --add")
    for f in files:
        shutil.copy(f, dest / f.name)
    shutil.copy(run / "recipe.toml", dest / f"recipe-{run.name}.toml")
    shutil.copy(run / "compress.log", dest / f"compress-{run.name}.log")
    ladder["candidates"].update(manifest["candidates"])
    ladder.setdefault("added", []).append({"run": run.name, "candidates": sorted(manifest["candidates"]),
                                          "splits": manifest["splits"],
                                          "int8_probe": manifest.get("int8_probe")})
    tmp = ladder_path.with_suffix(".tmp")
    tmp.write_text(json.dumps(ladder, indent=1))
    tmp.replace(ladder_path)


if __name__ == "__main__":
    sys.exit(main())
