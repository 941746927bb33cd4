"""Style and content scores with trained VGG-16 features, torch-free.

The HED trunk (bench/hed_weights.py; VGG-16 fine-tuned from ImageNet, Xie and Tu 2015)
is written once as an ONNX graph (conv1_1 .. conv4_3, Caffe preprocessing inside: BGR
uint8 in, minus HED's means) into the Limner cache, keyed by the weight file's SHA-256,
and run by onnxruntime. Writing it needs h5py and onnx (the compress extra); running it
needs only onnxruntime.

- Style share (Gatys et al. 2016 Gram matrices at relu1_2, relu2_2, relu3_3, relu4_3,
  each normalised by C*H*W as in Johnson et al. 2016): for each layer the squared
  Frobenius distance of the output's Gram to the style image's, divided by the same
  distance for the unstylised photo; the mean over the four layers. 1 = as far from the
  style as the photo, 0 = the style's statistics exactly.
- Content similarity: cosine similarity between the output's and the photo's relu4_3
  feature maps (flattened; Gatys et al. took content at the fourth block), 1 = the same.
"""
from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np
from limner.runtime.session import default_threads, make_session

from . import hed_weights

STYLE_TAPS = ("relu1_2", "relu2_2", "relu3_3", "relu4_3")
CONTENT_TAP = "relu4_3"
_BLOCKS = {1: 2, 2: 2, 3: 3, 4: 3}
SCORE_SIZE = (320, 180)   # frames are scored at this size (a quarter of 640x360's pixels)
STYLE_SIDE = 256          # the style image's side when scored (training's default style_size)


class StyleFeaturesUnavailable(Exception):
    """The weights or the packages that write the trunk are missing; the message says which."""


def trunk_path(h5: Path) -> Path:
    return hed_weights.cache_dir() / f"hed-trunk-relu4_3-{hed_weights._sha256(h5)[:16]}.onnx"


def write_trunk_onnx(h5: Path, out: Path) -> Path:
    """conv1_1 .. conv4_3 of the HED file as ONNX: uint8 (1, H, W, 3) BGR -> the four taps."""
    try:
        from onnx import TensorProto, helper, numpy_helper, save
    except ImportError:
        raise StyleFeaturesUnavailable("writing the feature network needs the onnx package "
                                       "(pip install onnx h5py, or Limner's compress extra)") from None
    from .lossnet_h5 import H5Error, read_hed_h5

    try:
        w = read_hed_h5(h5, heads=False).convs
    except H5Error as e:
        raise StyleFeaturesUnavailable(str(e)) from None
    mean = np.array(hed_weights.HED_MEANS_BGR, np.float32).reshape(1, 3, 1, 1)
    inits = [numpy_helper.from_array(mean, "mean")]
    nodes = [helper.make_node("Cast", ["image"], ["f"], to=TensorProto.FLOAT),
             helper.make_node("Transpose", ["f"], ["nchw"], perm=[0, 3, 1, 2]),
             helper.make_node("Sub", ["nchw", "mean"], ["h0"])]
    x, outputs = "h0", []
    for b, n in _BLOCKS.items():
        if b > 1:
            nodes.append(helper.make_node("MaxPool", [x], [f"pool{b}"], kernel_shape=[2, 2],
                                          strides=[2, 2], ceil_mode=1))
            x = f"pool{b}"
        for k in range(1, n + 1):
            name = f"conv{b}_{k}"
            kern, bias = w[name]
            inits += [numpy_helper.from_array(kern, f"{name}.w"), numpy_helper.from_array(bias, f"{name}.b")]
            relu = f"relu{b}_{k}"
            nodes += [helper.make_node("Conv", [x, f"{name}.w", f"{name}.b"], [f"{name}.y"], pads=[1] * 4),
                      helper.make_node("Relu", [f"{name}.y"], [relu])]
            x = relu
        outputs.append(helper.make_tensor_value_info(x, TensorProto.FLOAT, None))
    graph = helper.make_graph(nodes, "hed_trunk",
                              [helper.make_tensor_value_info("image", TensorProto.UINT8, [1, None, None, 3])],
                              outputs, inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    out.parent.mkdir(parents=True, exist_ok=True)
    part = out.with_name(out.name + ".part")
    save(model, str(part))
    os.replace(part, out)
    return out


def gram(f: np.ndarray) -> np.ndarray:
    # f: (C, H, W) -> (C, C), normalised by C*H*W (Johnson et al. 2016, eq. 3)
    c, h, w = f.shape
    flat = f.reshape(c, h * w).astype(np.float64)
    return flat @ flat.T / (c * h * w)


@dataclass
class StyleScorer:
    """Scores frames against one style image with the HED trunk."""
    session: object
    style_grams: dict[str, np.ndarray]
    source: str  # "hed:sha256=..."

    @classmethod
    def open(cls, style_bgr: np.ndarray, threads: int = 0) -> "StyleScorer":
        h5 = hed_weights.locate()
        if h5 is None:
            raise StyleFeaturesUnavailable(hed_weights.missing_message())
        path = trunk_path(h5)
        if not path.is_file():
            write_trunk_onnx(h5, path)
        session = make_session(str(path), threads or default_threads())
        s = cv2.resize(style_bgr, (STYLE_SIDE, STYLE_SIDE), interpolation=cv2.INTER_AREA)
        scorer = cls(session, {}, f"hed:sha256={hed_weights._sha256(h5)}")
        scorer.style_grams = {k: gram(v) for k, v in scorer.features(s, resize=False).items()}
        return scorer

    def features(self, bgr: np.ndarray, resize: bool = True) -> dict[str, np.ndarray]:
        """(H, W, 3) uint8 BGR -> {tap: (C, h, w)}; scored at SCORE_SIZE unless resize=False."""
        if resize and (bgr.shape[1], bgr.shape[0]) != SCORE_SIZE:
            bgr = cv2.resize(bgr, SCORE_SIZE, interpolation=cv2.INTER_AREA)
        outs = self.session.run(None, {"image": np.ascontiguousarray(bgr)[None]})
        return {k: o[0] for k, o in zip(STYLE_TAPS, outs)}

    def style_distances(self, feats: dict[str, np.ndarray]) -> dict[str, float]:
        return {k: float(((gram(feats[k]) - self.style_grams[k]) ** 2).sum()) for k in STYLE_TAPS}

    def score(self, output_bgr: np.ndarray, photo_bgr: np.ndarray,
              photo_feats: dict[str, np.ndarray] | None = None) -> dict[str, float]:
        """style_share and content_similarity of one stylised frame against its photo, and the
        share at each tap (style_share_relu1_2, ...), whose mean is style_share."""
        fo, fp = self.features(output_bgr), photo_feats or self.features(photo_bgr)
        do, dp = self.style_distances(fo), self.style_distances(fp)
        layers = {f"style_share_{k}": do[k] / max(dp[k], 1e-12) for k in STYLE_TAPS}
        a, b = fo[CONTENT_TAP].ravel().astype(np.float64), fp[CONTENT_TAP].ravel().astype(np.float64)
        cos = float(a @ b / max(np.linalg.norm(a) * np.linalg.norm(b), 1e-12))
        return {"style_share": float(np.mean(list(layers.values()))), "content_similarity": cos, **layers}


def open_for_style(style: str, threads: int = 0) -> tuple["StyleScorer | None", str]:
    """A scorer for a bundled style name or a style image path, or (None, why not)."""
    from limner.runtime.styles import style_image

    try:
        bgr, _ = style_image(style)
    except ValueError as e:
        return None, f"style image unavailable: {e}"
    try:
        return StyleScorer.open(bgr, threads), ""
    except StyleFeaturesUnavailable as e:
        return None, str(e)


def score_set(scorer: StyleScorer, outputs: list[np.ndarray], photos: list[np.ndarray],
              photo_feats: list[dict[str, np.ndarray]]) -> dict[str, dict[str, float]]:
    """Mean and worst of style_share (worst: highest) and content_similarity (worst: lowest)."""
    per = [scorer.score(o, p, f) for o, p, f in zip(outputs, photos, photo_feats)]
    s = [d["style_share"] for d in per]
    c = [d["content_similarity"] for d in per]
    return {"style_share": {"mean": float(np.mean(s)), "worst": float(max(s))},
            "content_similarity": {"mean": float(np.mean(c)), "worst": float(min(c))}}
