"""Rebuild the bundled real-photo corpus and the street clip from registry packages.

Sources (nothing downloaded from elsewhere):
  - Debian's opencv-doc package (examples/data): fetched with `apt-get download opencv-doc`
    and unpacked with `dpkg-deb -x` into a temp folder (no root install). Its copyright file
    puts samples/data under the OpenCV project's licence (Apache-2.0 AND BSD-3-Clause).
  - scikit-image's bundled sample data (skimage/data), CC0 for the two photos used here.
Left out on purpose: photos of identifiable people, logos, brand characters, artworks,
branded products and licence plates (listed in EXCLUDED with the reason), and
scikit-learn's sample images (reserved for independent evaluation).

Every photo is re-encoded as JPEG (quality 92) with its long side at most 640 px and put
into one split, by source image (stereo pairs and video frames stay together):
train (teacher training, distillation), calib (int8 calibration), heldout (bench quality,
previews, docs). The street clip (a cut of vtest.avi) is held out too: demo, stability.

    python tools/build_corpus.py [--opencv-doc DIR] [-o runtime/assets]
"""
from __future__ import annotations

import argparse
import subprocess
import tempfile
from pathlib import Path

import cv2
import numpy as np

OCV = "opencv-doc (Debian 4.6.0+dfsg-12), examples/data"
OCV_LICENCE = "Apache-2.0 AND BSD-3-Clause (OpenCV; debian/copyright, Files: *)"
SKI = "scikit-image 0.26 skimage/data"

# name in the corpus -> (package, file in the package, split, source id, licence, what it shows)
PHOTOS: dict[str, tuple[str, str, str, str, str, str]] = {
    "aero1": ("ocv", "aero1.jpg", "train", "aero1", OCV_LICENCE, "aerial view of a town"),
    "aero3": ("ocv", "aero3.jpg", "train", "aero3", OCV_LICENCE, "aerial view of a valley and roads"),
    "aloe-left": ("ocv", "aloeL.jpg", "train", "aloe", OCV_LICENCE, "aloe plant in a pot (stereo left)"),
    "aloe-right": ("ocv", "aloeR.jpg", "train", "aloe", OCV_LICENCE, "aloe plant in a pot (stereo right)"),
    "apple": ("ocv", "apple.jpg", "train", "apple", OCV_LICENCE, "a red apple"),
    "baboon": ("ocv", "baboon.jpg", "train", "baboon", OCV_LICENCE, "mandrill face"),
    "circuit": ("ocv", "board.jpg", "train", "board", OCV_LICENCE, "circuit board"),
    "hotel": ("ocv", "building.jpg", "train", "building", OCV_LICENCE, "hotel facade and trees"),
    "butterfly": ("ocv", "butterfly.jpg", "train", "butterfly", OCV_LICENCE, "butterfly on leaves"),
    "dog": ("ocv", "chicky_512.png", "train", "chicky_512", OCV_LICENCE, "small long-haired dog"),
    "palace": ("ocv", "home.jpg", "train", "home", OCV_LICENCE, "palace towers against blue sky"),
    "orange": ("ocv", "orange.jpg", "train", "orange", OCV_LICENCE, "an orange"),
    "toys-1": ("ocv", "rubberwhale1.png", "calib", "rubberwhale", OCV_LICENCE, "toys on a table"),
    "toys-2": ("ocv", "rubberwhale2.png", "calib", "rubberwhale", OCV_LICENCE, "toys on a table, next frame"),
    "desk": ("ocv", "stuff.jpg", "calib", "stuff", OCV_LICENCE, "pen, cup and lighter on a desk"),
    "chelsea": ("ski", "chelsea.png", "heldout", "chelsea", "CC0 (Stefan van der Walt)", "a cat"),
    "coffee": ("ski", "coffee.png", "heldout", "coffee", "CC0 (Rachel Michetti)", "a cup of coffee"),
    "squirrel": ("ocv", "squirrel_cls.jpg", "heldout", "squirrel_cls", OCV_LICENCE, "squirrel on a branch"),
    "fruits": ("ocv", "fruits.jpg", "heldout", "fruits", OCV_LICENCE, "cut citrus fruits and kiwi"),
    "street-1": ("ocv", "leuvenA.jpg", "heldout", "leuven", OCV_LICENCE, "old town street"),
    "street-2": ("ocv", "leuvenB.jpg", "heldout", "leuven", OCV_LICENCE, "old town street, other view"),
}
# Frames of tree.avi (320x240, a tree through a window) join the training split.
TREE_FRAMES = 6
EXCLUDED = {
    "messi5.jpg, basketball1/2.png": "identifiable people",
    "starry_night.jpg, graf1/graf3.png": "artworks (a painting, graffiti)",
    "LinuxLogo, WindowsLogo, opencv-logo*, HappyFish, Blender_Suzanne*, ml.png": "logos, brand characters",
    "ela_original/ela_modified.jpg": "shows a brand mascot sticker",
    "box*.png, smarties.png": "branded products",
    "licenseplate_motion.jpg": "a licence plate",
    "Megamind*.avi": "a brand character",
    "left*/right*.jpg, chessboard, sudoku, text*, pic*, digits, ...": "calibration targets and synthetic images",
    "skimage astronaut, camera, rocket; matplotlib grace_hopper": "identifiable people, a company's product",
}
CLIP = ("vtest.avi", 0, 150)  # first 150 frames (15 s at 10 fps): walkers seen from far above


def fetch_opencv_doc(tmp: Path) -> Path:
    subprocess.run(["apt-get", "download", "opencv-doc"], cwd=tmp, check=True, capture_output=True)
    deb = next(tmp.glob("opencv-doc_*.deb"))
    subprocess.run(["dpkg-deb", "-x", str(deb), str(tmp / "x")], check=True)
    return tmp / "x" / "usr/share/doc/opencv-doc/examples/data"


def _fit(img: np.ndarray, side: int = 640) -> np.ndarray:
    h, w = img.shape[:2]
    k = side / max(h, w)
    return img if k >= 1 else cv2.resize(img, (round(w * k), round(h * k)), interpolation=cv2.INTER_AREA)


def build(ocv: Path, out: Path) -> None:
    import skimage

    ski = Path(skimage.__file__).parent / "data"
    photos = out / "photos"
    rows = []
    for name, (pkg, fname, split, src, lic, what) in PHOTOS.items():
        path = (ocv if pkg == "ocv" else ski) / fname
        img = cv2.imread(str(path), cv2.IMREAD_COLOR)
        if img is None:
            raise SystemExit(f"{path}: not readable")
        (photos / split).mkdir(parents=True, exist_ok=True)
        cv2.imwrite(str(photos / split / f"{name}.jpg"), _fit(img), [cv2.IMWRITE_JPEG_QUALITY, 92])
        rows.append((f"{split}/{name}.jpg", OCV if pkg == "ocv" else SKI, fname, src, lic, what))
    cap = cv2.VideoCapture(str(ocv / "tree.avi"))
    frames = []  # read in order: seeking in this AVI lands on wrong or no frames
    while True:
        ok, f = cap.read()
        if not ok:
            break
        frames.append(f)
    for k, idx in enumerate(np.linspace(0, len(frames) - 1, TREE_FRAMES).astype(int)):
        cv2.imwrite(str(photos / "train" / f"tree-{k}.jpg"), frames[idx], [cv2.IMWRITE_JPEG_QUALITY, 92])
        rows.append((f"train/tree-{k}.jpg", OCV, f"tree.avi frame {idx}", "tree.avi", OCV_LICENCE,
                     "tree through a window (video frame)"))
    cap.release()
    write_clip(ocv / CLIP[0], out / "clips" / "street.mp4")
    lines = ["# Bundled photos and clip", "",
             "Re-encoded by Limner (`tools/build_corpus.py`) from sample data that ships in",
             "registry packages; licences as the packages state them. Split by source image:",
             "`train/` (teacher training and distillation), `calib/` (int8 calibration),",
             "`heldout/` (bench quality, previews, docs; never trained or calibrated on).", "",
             "| file | package | original | source id | licence | shows |", "|---|---|---|---|---|---|"]
    lines += [f"| {a} | {b} | {c} | {d} | {e} | {f} |" for a, b, c, d, e, f in rows]
    lines += ["", "## Clip", "",
              f"`../clips/street.mp4`: frames {CLIP[1]}-{CLIP[2] - 1} of {OCV} `vtest.avi` (768x576, 10 fps),",
              "cover-cropped to 640x360 and re-encoded (mp4v). People walk across a campus",
              "road, seen from far above; at this size no face can be made out. Held out:",
              "the demo clip and the bench's stability and warping-error input.", "",
              "## Left out", "", "| files | why |", "|---|---|"]
    lines += [f"| {k} | {v} |" for k, v in EXCLUDED.items()]
    lines += ["", "scikit-learn's sample images are reserved for independent evaluation:",
              "never trained on, calibrated on or bundled."]
    (photos / "SOURCES.md").write_text("\n".join(lines) + "\n")


def write_clip(src: Path, dst: Path) -> None:
    cap = cv2.VideoCapture(str(src))
    fps = cap.get(cv2.CAP_PROP_FPS) or 10.0
    dst.parent.mkdir(parents=True, exist_ok=True)
    w = cv2.VideoWriter(str(dst), cv2.VideoWriter_fourcc(*"mp4v"), fps, (640, 360))
    cap.set(cv2.CAP_PROP_POS_FRAMES, CLIP[1])
    for _ in range(CLIP[2] - CLIP[1]):
        ok, f = cap.read()
        if not ok:
            break
        h, wd = f.shape[:2]  # 768x576 -> cover crop to 16:9, then 640x360
        ch = round(wd * 9 / 16)
        y = (h - ch) // 2
        w.write(cv2.resize(f[y:y + ch], (640, 360), interpolation=cv2.INTER_AREA))
    w.release()
    cap.release()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--opencv-doc", type=Path, help="an unpacked opencv-doc examples/data folder")
    ap.add_argument("-o", "--out", type=Path, default=Path("runtime/assets"))
    a = ap.parse_args()
    if a.opencv_doc:
        build(a.opencv_doc, a.out)
        return
    with tempfile.TemporaryDirectory() as tmp:
        build(fetch_opencv_doc(Path(tmp)), a.out)


if __name__ == "__main__":
    main()
