"""Compression: pruning removes real channels, int8 is really int8, and a tiny recipe
runs end to end (onnxruntime is the reference runtime throughout)."""
from __future__ import annotations

import json
import subprocess
from dataclasses import asdict

import numpy as np
import onnx
import pytest
import torch

from limner.bench.metrics import ms_ssim
from limner.compress import checkpoint as ck
from limner.compress.layers import FrameFiLM, Residual
from limner.compress.prune import conv_weight_count, prune, prune_to, spaces
from limner.compress.registry import build
from limner.compress.students import PRESETS
from limner.runtime.hashing import file_sha256
from limner.runtime.model import load_model

from conftest import PY, REPO

PHOTOS = [str(REPO / "runtime/assets/photos/train" / f"{n}.jpg") for n in ("dog", "hotel", "apple")]
TINY_RECIPE = """crop = 64
batch = 2
cache_crops = 12
target_frame = "160x96"
crops_per_frame = 4
checkpoint_every = 5
threads = 2
loss_net = "random"

[loss]
lowpass_l1 = 1.0

[[student]]
name = "a"
knobs = {width = 0.25, blocks = 1, kernel_in = 3, kernel_out = 3, downscale = 2, upsample = "shuffle", context = true}
steps = 6

[[student]]
name = "b"
knobs = {width = 0.25, blocks = 1, depthwise = true}
steps = 4
loss = {gram = 0.0}

[[prune]]
name = "a-p30"
parent = "a"
ratio = 0.3
steps = 3

[int8]
calibration_frames = 4
calibration_size = 64
max_fp32_layers = 1
models = ["a", "a-p30"]
"""


PRUNE_SHAPES = {k: asdict(v) for k, v in PRESETS.items()} | {
    "s-half-context": asdict(PRESETS["s-half"]) | {"context": True},
    "s-half-context-blocks": asdict(PRESETS["s-half"]) | {"context": True, "context_blocks": True},
    "s-half-context-spread": asdict(PRESETS["s-half"]) | {"context": True, "context_blocks": True,
                                                          "context_spread": True}}


@pytest.mark.parametrize("name", list(PRUNE_SHAPES))
def test_pruning_zero_filters_leaves_output_unchanged(name):
    """Channels whose producing filters (and biases) are exactly zero contribute nothing;
    removing them must not change the output (checked in float64, where the only
    difference left is summation order), and the convs must really shrink."""
    torch.manual_seed(0)
    net = build("student", **PRUNE_SHAPES[name]).double().eval()
    for m in net.modules():  # frame context starts at zero: give it an effect
        if isinstance(m, FrameFiLM):
            for c in (m.gamma, m.beta):
                c.weight.data.normal_(0, 0.05)
                c.bias.data.normal_(0, 0.05)
            if m.spread is not None:  # reads the standard deviations of dropped channels too
                m.spread.weight.data.normal_(0, 0.5)
    keep = {}
    with torch.no_grad():
        for space, s in spaces(net).items():
            drop = torch.arange(0, s.size, 3)
            for conv, rows in s.producers:
                r = (drop[:, None] * rows + torch.arange(rows)[None]).reshape(-1)
                conv.weight[r] = 0
                conv.bias[r] = 0
            for conv in s.depthwise:
                conv.weight[drop] = 0
                conv.bias[drop] = 0
            keep[space] = torch.tensor([i for i in range(s.size) if i % 3])
    small = prune_to(net, keep).double()
    x = torch.rand(2, 3, 64, 96, dtype=torch.float64)
    with torch.no_grad():
        assert (net(x) - small(x)).abs().max() < 1e-9  # float64 rounding only (float32 eps ~1e-7)
    assert conv_weight_count(small) < conv_weight_count(net)
    shrunk = [(a.weight.shape, b.weight.shape) for a, b in
              zip([m for m in net.modules() if isinstance(m, torch.nn.Conv2d)],
                  [m for m in small.modules() if isinstance(m, torch.nn.Conv2d)]) if a.weight.shape != b.weight.shape]
    assert shrunk


@pytest.mark.parametrize("ratio", [0.2, 0.3, 0.5])
def test_pruning_ratio_within_five_percent(ratio):
    net = build("student", **asdict(PRESETS["s-half"]))
    small = prune(net, ratio)
    achieved = 1 - conv_weight_count(small) / conv_weight_count(net)
    assert abs(achieved - ratio) <= 0.05


def test_cached_targets_are_crops_of_whole_frame_outputs(teacher_onnx, tmp_path):
    """Frame-context targets: each cached target equals the same crop of the teacher's
    output for the whole frame, run again here through onnxruntime (the reference runtime);
    the crop offsets sit on the students' 8-pixel grid."""
    from limner.compress.content import load_content, sample_frame
    from limner.compress.distill import build_cache
    from limner.compress.recipe import Recipe

    recipe = Recipe(crop=64, cache_crops=6, target_frame="160x96", crops_per_frame=3)
    data = load_content(PHOTOS, min_side=64)
    teacher = load_model(teacher_onnx, threads=1)
    sha = file_sha256(teacher_onnx)
    cache = build_cache(teacher, data, recipe, tmp_path / "cache.npz", sha)
    for f in range(2):
        frame = sample_frame(data, np.random.default_rng([recipe.seed, 7919, f]), 160, 96, recipe.camera_augment)
        out = teacher.run(frame)
        for i in range(3 * f, 3 * f + 3):
            rgb = cache["inputs"][i]
            hits = [(y, x) for y in range(0, 96 - 64 + 1, 8) for x in range(0, 160 - 64 + 1, 8)
                    if np.array_equal(frame[y:y + 64, x:x + 64, ::-1], rgb)]
            assert hits, "cached input is not an 8-aligned crop of its frame"
            y, x = hits[0]
            assert np.array_equal(cache["targets"][i], out[y:y + 64, x:x + 64, ::-1])
            assert np.array_equal(cache["frames"][cache["frame_index"][i]], frame[:, :, ::-1])
    # a changed recipe rebuilds the cache instead of reusing stale targets
    other = build_cache(teacher, data, Recipe(crop=64, cache_crops=6, target_frame=""), tmp_path / "cache.npz",
                        sha)
    assert not np.array_equal(other["inputs"], cache["inputs"])
    # so do another teacher and other content: the file's key names both
    again = build_cache(teacher, data, recipe, tmp_path / "cache.npz", sha)
    assert np.array_equal(again["inputs"], cache["inputs"]) and again["key"] == cache["key"]
    assert build_cache(teacher, data, recipe, tmp_path / "cache.npz", "0" * 64)["key"] != cache["key"]
    fewer = load_content(PHOTOS[:1], min_side=64)
    assert build_cache(teacher, fewer, recipe, tmp_path / "cache.npz", sha)["key"] != cache["key"]


def test_whole_frame_distillation_keeps_photos_smaller_than_a_crop(tmp_path):
    """With whole frames a photo is resized to the frame before crops are cut, so a 240 px
    photo serves 256 px crops of a 640x360 frame; without frames it cannot (it would not hold
    one crop). Common practice, no source: 240x320 is the bundled video stills' size."""
    import cv2

    from limner.compress.pipeline import _content_splits
    from limner.compress.recipe import Recipe

    rng = np.random.default_rng(3)
    content = tmp_path / "content"
    content.mkdir()
    for i, (h, w) in enumerate([(240, 320), (400, 600), (170, 300)]):
        cv2.imwrite(str(content / f"p{i}.png"), rng.integers(0, 256, (h, w, 3), dtype=np.uint8))
    calib = tmp_path / "calib"
    calib.mkdir()
    cv2.imwrite(str(calib / "c.png"), rng.integers(0, 256, (300, 300, 3), dtype=np.uint8))
    framed = Recipe(crop=256, target_frame="640x360")
    assert framed.min_content_side() == 180
    data, _ = _content_splits([str(content)], [str(calib)], framed)
    assert sorted(i.image.shape[0] for i in data.items) == [240, 400]   # the 170 px one is out
    cropped = Recipe(crop=256, target_frame="")
    data, _ = _content_splits([str(content)], [str(calib)], cropped)
    assert [i.image.shape[0] for i in data.items] == [400]


def test_camera_augment_stays_within_its_stated_ranges(photos):
    """Exposure and white balance within the documented gains, noise that a denoiser
    (OpenCV's Gaussian blur as the reference low-pass) mostly removes, and the frame
    stays the same scene (SSIM to the original above 0.3, Wang et al. 2004)."""
    from limner.bench.metrics import ssim
    from limner.compress.content import camera_augment

    img = photos["coffee"][:192, :256]
    ratios, changed = [], 0
    for k in range(24):
        out = camera_augment(img, np.random.default_rng(k))
        assert out.shape == img.shape and out.dtype == np.uint8
        ratios.append(out[:, :, 1].mean() / img[:, :, 1].mean())  # green: exposure only
        changed += not np.array_equal(out, img)
        assert ssim(out, img) > 0.3
    assert changed == 24
    assert 0.6 < min(ratios) and max(ratios) < 1.4 and max(ratios) - min(ratios) > 0.2


@pytest.fixture(scope="module")
def tiny_run(teacher_onnx, tmp_path_factory):
    out = tmp_path_factory.mktemp("compress")
    (out / "tiny.toml").write_text(TINY_RECIPE)
    r = subprocess.run([PY, "-m", "limner.runtime.cli", "compress", str(teacher_onnx), "--content", *PHOTOS,
                        "scenes:3", "--recipe", str(out / "tiny.toml"), "-o", str(out / "run")],
                       capture_output=True, text=True, timeout=900)
    assert r.returncode == 0, r.stderr[-3000:]
    return out / "run", r


def test_tiny_recipe_end_to_end(tiny_run):
    run, _ = tiny_run
    man = json.loads((run / "manifest.json").read_text())
    assert set(man["candidates"]) == {"a", "b", "a-p30", "a-int8", "a-p30-int8"}
    for name, c in man["candidates"].items():
        m = load_model(run / c["file"], threads=1)
        assert m.meta.name == name and m.meta.data_sha256  # every image it saw is recorded
        for k in ("parameters", "macs_640x360", "file_bytes", "sha256", "wall_s"):
            assert c[k], (name, k)
    # a student's own loss changes apply to it alone, and its file records what it used
    losses = {n: load_model(run / f"{n}.onnx", threads=1).meta.recipe["distill_loss"] for n in ("a", "b")}
    assert losses["b"]["gram"] == 0.0 and losses["a"]["gram"] == 1.0
    assert losses["a"]["lowpass_l1"] == losses["b"]["lowpass_l1"] == 1.0
    assert man["candidates"]["a"]["distill"]["device"] == "cpu"  # the recipe's default
    p = man["candidates"]["a-p30"]
    assert p["role"] == "pruned" and p["parent"] == man["candidates"]["a"]["sha256"]
    assert abs(1 - p["conv_weights"] / p["before_pruning"]["conv_weights"] - 0.3) <= 0.05
    # each pruned ONNX file has fewer conv weights than its parent's, by the ratio
    def onnx_conv_weights(path):
        g = onnx.load(str(path)).graph
        ws = {n.input[1] for n in g.node if n.op_type == "Conv"}
        return sum(int(np.prod(i.dims)) for i in g.initializer if i.name in ws)
    ratio = 1 - onnx_conv_weights(run / "a-p30.onnx") / onnx_conv_weights(run / "a.onnx")
    assert abs(ratio - 0.3) <= 0.05
    assert (run / "recipe.toml").exists() and (run / "compress.log").exists()
    # the int8 stage first timed int8 against fp32 convs on this CPU, and says so
    probe = man["int8_probe"]
    assert probe["fp32_ms"] > 0 and probe["int8_ms"] > 0 and probe["types"] in ("u8s8", "u8s8-reduced", "s8s8")
    assert "int8 probe:" in (run / "compress.log").read_text()
    splits = man["splits"]
    assert not set(splits["distillation"]["sha256"]) & set(splits["calibration"]["sha256"])


def assert_int8_convs(q: onnx.ModelProto, min_share: float = 0.8) -> None:
    """At least min_share of the Conv nodes take both input and weight from DequantizeLinear,
    the weight from an int8 initializer (the QDQ form ONNX Runtime's quantizer writes). A
    conv kept in fp32 (the int8 step may keep up to `max_fp32_layers`) reads its weight from
    an fp32 initializer, possibly after a quantized input."""
    produced = {o: n for n in q.graph.node for o in n.output}
    int8 = {i.name for i in q.graph.initializer if i.data_type in (onnx.TensorProto.INT8, onnx.TensorProto.UINT8)}
    convs = [n for n in q.graph.node if n.op_type == "Conv"]

    def dequantized(name: str) -> bool:
        return name in produced and produced[name].op_type == "DequantizeLinear"

    quantized = [n for n in convs if dequantized(n.input[0]) and dequantized(n.input[1])
                 and produced[n.input[1]].input[0] in int8]
    assert len(quantized) >= min_share * len(convs) and len(quantized) >= 1, (len(quantized), len(convs))


def test_int8_candidates_are_really_int8(tiny_run, photos):
    """Count QuantizeLinear/DequantizeLinear around Conv and int8 weight initializers
    (as ONNX Runtime's own quantization tests do), and check the int8 output against
    its fp32 parent on real photos with onnxruntime."""
    run, _ = tiny_run
    for name in ("a", "a-p30"):
        q = onnx.load(str(run / f"{name}-int8.onnx"))
        produced = {o: n for n in q.graph.node for o in n.output}
        assert_int8_convs(q)
        # the output tail after the last conv (Sigmoid, scaling, Cast, layout) stays unquantized:
        # the only quantize step after the last conv is on that conv's own output
        last = max(i for i, n in enumerate(q.graph.node) if n.op_type == "Conv")
        tail_q = [n for n in q.graph.node[last + 1:] if n.op_type == "QuantizeLinear"]
        assert all(produced[n.input[0]] is q.graph.node[last] for n in tail_q)
        meta = load_model(run / f"{name}-int8.onnx", threads=1).meta
        assert meta.precision == "int8" and meta.calibration["method"] == "minmax"
        assert meta.calibration["int8_mac_share"] >= 0.8
        fp32 = load_model(run / f"{name}.onnx", threads=1)
        i8 = load_model(run / f"{name}-int8.onnx", threads=1)
        img = np.ascontiguousarray(photos["chelsea"][:192, :320])
        assert ms_ssim(i8.run(img), fp32.run(img)) > 0.9


def test_rerun_skips_finished_candidates(tiny_run, teacher_onnx):
    run, _ = tiny_run
    r = subprocess.run([PY, "-m", "limner.runtime.cli", "compress", str(teacher_onnx), "--content", *PHOTOS,
                        "scenes:3", "--recipe", str(run.parent / "tiny.toml"), "-o", str(run)],
                       capture_output=True, text=True, timeout=600)
    assert r.returncode == 0
    assert r.stdout.count("done earlier, skipped") == 5


def test_student_init_checkpoint_must_match_knobs(tmp_path):
    from limner.compress import checkpoint as ck
    from limner.compress.warm_start import CompressError, init_from

    knobs = asdict(PRESETS["s-tiny"])
    torch.manual_seed(0)
    net = build("student", **knobs)
    ck.save(ck.from_model(net, {"name": "tiny"}), tmp_path / "tiny.pt")
    same = init_from(str(tmp_path / "tiny.pt"), build("student", **knobs), "tiny")
    for a, b in zip(net.state_dict().values(), same.state_dict().values()):
        assert torch.equal(a, b)
    # a student with frame context starts from the same student without it, unchanged
    ctx = init_from(str(tmp_path / "tiny.pt"), build("student", **knobs | {"context": True}), "tiny-ctx").eval()
    x = torch.rand(1, 3, 64, 96)
    with torch.no_grad():
        assert torch.allclose(ctx(x), net.eval()(x), atol=1e-6)
    # and one with a context block after every residual block from the one with only the first
    ck.save(ck.from_model(ctx, {"name": "tiny-ctx"}), tmp_path / "tiny-ctx.pt")
    blocks = init_from(str(tmp_path / "tiny-ctx.pt"),
                       build("student", **knobs | {"context": True, "context_blocks": True}), "tiny-cb").eval()
    assert len(blocks.context_points) == 1 + knobs["blocks"]
    with torch.no_grad():
        assert torch.equal(blocks(x), ctx(x))
    # and one that also pools standard deviations from one that pools means only (the
    # spread convs start at zero), but not the other way round: that would drop weights
    ck.save(ck.from_model(blocks, {"name": "tiny-cb"}), tmp_path / "tiny-cb.pt")
    cb_knobs = knobs | {"context": True, "context_blocks": True}
    spread = init_from(str(tmp_path / "tiny-cb.pt"), build("student", **cb_knobs | {"context_spread": True}),
                       "tiny-sp").eval()
    with torch.no_grad():
        assert torch.equal(spread(x), blocks(x))
    ck.save(ck.from_model(spread, {"name": "tiny-sp"}), tmp_path / "tiny-sp.pt")
    with pytest.raises(CompressError, match="different architecture"):
        init_from(str(tmp_path / "tiny-sp.pt"), build("student", **cb_knobs), "tiny-cb2")
    # another downscale: the body carries over, the first and last convs start fresh
    other = 4 if knobs["downscale"] != 4 else 2
    fresh = build("student", **knobs | {"downscale": other})
    first_before = fresh.state_dict()[next(iter(fresh.state_dict()))].clone()
    moved = init_from(str(tmp_path / "tiny.pt"), fresh, "tiny-d").state_dict()
    old_sd = net.state_dict()
    keys = list(moved)
    assert torch.equal(moved[keys[0]], first_before)          # first conv: fresh
    assert all(torch.equal(moved[k], old_sd[k]) for k in keys[2:-2])  # body: carried over
    # a deeper student of the same widths starts as the shallower one: the extra blocks
    # start as the identity (exact: the residual add of a zero branch, Johnson et al.
    # 2016's blocks), and their first convs keep a random start so training can use them
    deep = init_from(str(tmp_path / "tiny.pt"), build("student", **knobs | {"blocks": knobs["blocks"] + 2}),
                      "tiny-deep").eval()
    with torch.no_grad():
        assert torch.equal(deep(x), net(x))
    assert len(deep.state_dict()) == len(old_sd) + 8
    extra_first = [m for m in deep.net if isinstance(m, Residual)][-1].body[0].weight
    assert extra_first.abs().sum() > 0
    with pytest.raises(CompressError, match="different architecture"):  # fewer blocks: no
        init_from(str(tmp_path / "tiny.pt"), build("student", **knobs | {"blocks": 0}), "tiny-0")
    with pytest.raises(CompressError, match="different architecture"):
        init_from(str(tmp_path / "tiny.pt"), build("student", **asdict(PRESETS["s-dw"])), "dw")
    with pytest.raises(CompressError, match="no such checkpoint"):
        init_from(str(tmp_path / "missing.pt"), net, "tiny")


def test_wider_student_starts_as_the_narrower_one(tmp_path):
    """Function-preserving widening (Net2Net, Chen et al. 2016; here with zero-initialised
    consumer weights): a student at a larger `width` started from a narrower checkpoint
    gives the same output on any input, and its new channels are live (random producers)."""
    from limner.compress import checkpoint as ck
    from limner.compress.warm_start import CompressError, init_from

    knobs = {"width": 0.25, "blocks": 2, "kernel_in": 3, "kernel_out": 3, "downscale": 2,
             "upsample": "resize", "context": True}
    torch.manual_seed(0)
    net = build("student", **knobs)
    for m in net.modules():  # a trained-looking context block (it starts at zero)
        if isinstance(m, torch.nn.Conv2d) and not m.weight.any():
            torch.nn.init.normal_(m.weight, std=0.1)
    ck.save(ck.from_model(net, {"name": "narrow"}), tmp_path / "narrow.pt")
    wide = init_from(str(tmp_path / "narrow.pt"), build("student", **knobs | {"width": 0.5, "blocks": 3}),
                     "wide").eval()
    assert wide.model_args["channels"] == [16, 32, 64] and net.model_args["channels"] == [8, 16, 32]
    x = torch.rand(2, 3, 64, 96)
    with torch.no_grad():
        assert torch.allclose(wide(x), net.eval()(x), atol=1e-6)
    first = wide.net[1].weight                                   # (16, 12, 3, 3)
    assert first[8:].abs().sum() > 0                             # new outputs: a random start
    assert torch.equal(first[:8], net.net[1].weight)             # old outputs: carried over
    assert not wide.net[3].weight[:, 8:].any()                   # from new inputs: zero
    # a wider decoder alone (decoder_width) widens the same way: only the up-path grows
    dec = init_from(str(tmp_path / "narrow.pt"), build("student", **knobs | {"decoder_width": 2.0}),
                    "dec").eval()
    assert dec.model_args["up_channels"] == [32, 16] and net.model_args["up_channels"] == [16, 8]
    assert dec.model_args["channels"] == net.model_args["channels"]
    with torch.no_grad():
        assert torch.allclose(dec(x), net(x), atol=1e-6)
    with pytest.raises(CompressError, match="different architecture"):  # narrower: no
        init_from(str(tmp_path / "narrow.pt"), build("student", **knobs | {"width": 0.125}), "thin")
    shuffled = knobs | {"upsample": "shuffle"}  # a pixel-shuffle channel is four filters: no
    ck.save(ck.from_model(build("student", **shuffled), {"name": "narrow-s"}), tmp_path / "narrow-s.pt")
    with pytest.raises(CompressError, match="different architecture"):
        init_from(str(tmp_path / "narrow-s.pt"), build("student", **shuffled | {"width": 0.5}), "wide-s")


def test_unknown_student_loss_setting_is_named(tmp_path):
    from limner.compress.recipe import Recipe
    from limner.runtime import config as cfgmod

    bad = tmp_path / "r.toml"
    bad.write_text('[[student]]\nname = "a"\nloss = {grm = 0.0}\n')
    with pytest.raises(cfgmod.ConfigError, match="loss.grm"):
        cfgmod.load(Recipe, bad)


def _small_teacher():
    from limner.compress.teacher import Teacher
    torch.manual_seed(0)
    net = Teacher(channels=(8, 16, 24), blocks=2).eval()
    with torch.no_grad():  # trained-looking scales and shifts, so beta matters (set in float32:
        for m in net.modules():  # prune_to builds float32 layers, which must hold them exactly)
            if isinstance(m, torch.nn.InstanceNorm2d):
                m.weight.uniform_(0.5, 1.5)
                m.bias.normal_(0, 0.5)
    return net.double()


def test_pruning_teacher_channels_with_zero_scale_is_exact():
    """A teacher channel whose instance-norm scale is zero is the constant beta (by the
    definition of instance normalisation, Ulyanov et al. 2016); the next instance norm
    removes a constant, and the last conv gets it folded into its bias (Liu et al. 2017
    prune by this scale). Removing such channels must leave the output unchanged
    (float64: summation order only) while the convs shrink."""
    net = _small_teacher()
    keep = {}
    with torch.no_grad():
        for space, s in spaces(net).items():
            drop = torch.arange(0, s.size, 3)
            for n in s.norms:
                n.weight[drop] = 0
            keep[space] = torch.tensor([i for i in range(s.size) if i % 3])
    small = prune_to(net, keep).double()
    x = torch.rand(2, 3, 64, 96, dtype=torch.float64)
    with torch.no_grad():
        assert (net(x) - small(x)).abs().max() < 1e-9
    assert conv_weight_count(small) < conv_weight_count(net)
    assert small.model_args["hidden"] == [16, 16] and small.model_args["up_channels"] == [10, 5]
    from limner.compress.registry import rebuild
    again = rebuild("teacher", small.model_args)
    assert conv_weight_count(again) == conv_weight_count(small)


def test_teacher_pruning_ranks_by_norm_scale_and_reaches_ratio():
    net = _small_teacher()
    h0 = spaces(net)["h0"]
    with torch.no_grad():  # make one inner channel of the first block the least important
        h0.norms[0].weight[5] = 1e-3
    small = prune(net, 0.5)
    achieved = 1 - conv_weight_count(small) / conv_weight_count(net)
    assert abs(achieved - 0.5) <= 0.05
    kept = spaces(small)["h0"].producers[0][0].weight
    assert kept.shape[0] < h0.size
    # the lowest-|gamma| channel went: no kept filter equals its filter
    gone = h0.producers[0][0].weight[5]
    assert not any(torch.equal(gone, w) for w in kept)
    # and the kept channels are exactly those with the largest |gamma| (Liu et al. 2017)
    g = h0.norms[0].weight.detach().abs()
    kept_g = spaces(small)["h0"].norms[0].weight.detach().abs()
    assert torch.equal(torch.sort(kept_g).values, torch.sort(torch.topk(g, len(kept_g)).values).values)


def test_frame_statistics_make_a_crop_match_the_frame():
    """Instance norm with the whole frame's statistics: for a pointwise network the
    output on a crop is exactly the crop of the output on the frame; torch's own
    InstanceNorm2d (the reference) gives the same output when the crop is the frame."""
    from limner.compress import frame_norm

    torch.manual_seed(0)
    net = torch.nn.Sequential(torch.nn.Conv2d(3, 6, 1), torch.nn.InstanceNorm2d(6, affine=True),
                              torch.nn.ReLU(), torch.nn.Conv2d(6, 6, 1), torch.nn.InstanceNorm2d(6, affine=True)).double()
    with torch.no_grad():
        for m in net.modules():
            if isinstance(m, torch.nn.InstanceNorm2d):
                m.weight.uniform_(0.5, 1.5)
                m.bias.normal_(0, 0.5)
    frame = torch.rand(2, 3, 40, 56, dtype=torch.float64)
    crop = frame[:, :, 8:24, 16:48]
    stats = frame_norm.frame_stats(net, frame)
    with torch.no_grad():
        whole = net(frame)
        with frame_norm.use(net, stats):
            same = net(frame)
            inside = net(crop)
        alone = net(crop)
    assert (same - whole).abs().max() < 1e-12
    assert (inside - whole[:, :, 8:24, 16:48]).abs().max() < 1e-12
    assert (alone - whole[:, :, 8:24, 16:48]).abs().max() > 1e-3   # crop statistics differ


PRUNE_TEACHER = """crop = 64
batch = 2
cache_crops = 8
target_frame = "160x96"
crops_per_frame = 4
threads = 2

[[prune]]
name = "t-p50"
parent = "teacher"
ratio = 0.5
steps = 2
loss = {gram = 0.0}

[int8]
enabled = false
"""


def test_pruned_teacher_rung_end_to_end(teacher_onnx, tmp_path):
    """`[[prune]] parent = "teacher"` needs the checkpoint; from it, a smaller teacher
    whose ONNX file has half the conv weights (within 5%) and runs in onnxruntime."""
    (tmp_path / "r.toml").write_text(PRUNE_TEACHER)
    cmd = [PY, "-m", "limner.runtime.cli", "compress", "--content", *PHOTOS, "scenes:3",
           "--recipe", str(tmp_path / "r.toml")]
    r = subprocess.run(cmd[:4] + [str(teacher_onnx)] + cmd[4:] + ["-o", str(tmp_path / "x")],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode != 0 and "pruning the teacher needs its checkpoint" in r.stderr
    r = subprocess.run(cmd[:4] + [str(teacher_onnx.parent / "t.pt")] + cmd[4:] + ["-o", str(tmp_path / "run")],
                       capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr[-3000:]
    man = json.loads((tmp_path / "run" / "manifest.json").read_text())
    c = man["candidates"]["t-p50"]
    assert c["role"] == "pruned" and c["parent"] == man["teacher"]["sha256"]
    assert abs(1 - c["conv_weights"] / c["before_pruning"]["conv_weights"] - 0.5) <= 0.05
    m = load_model(tmp_path / "run" / "t-p50.onnx", threads=1)
    assert m.meta.recipe["distill_loss"]["gram"] == 0.0
    out = m.run(np.zeros((96, 160, 3), np.uint8))
    assert out.shape == (96, 160, 3) and out.dtype == np.uint8


@pytest.mark.parametrize("body, message", [
    ('[[prune]]\nname = "p"\nparent = "teacher"\nrank = "l1"\n', "does not fit parent 'teacher'"),
    ('[[prune]]\nname = "teacher"\nparent = "teacher"\n', "reserved"),
    ('[[prune]]\nname = "p"\nparent = "nobody"\n', "neither a student"),
    ('[[prune]]\nname = "p"\nparent = "teacher"\nsteps = 0\n', "steps=0"),
    ('device = "gpu"\n', "device='gpu'"),
    ('[[student]]\nname = "s"\nfamily = "tree"\n', "student s: unknown network family 'tree'"),
    ('[[student]]\nname = "s"\nknobs = {wings = 2}\n', "student s: bad knobs for 'student'.*wings"),
    ('[[student]]\nname = "s"\nknobs = {blocks = 40}\n', "student s: blocks=40"),
])
def test_prune_entry_errors_name_the_value(tmp_path, body, message):
    from limner.compress.recipe import Recipe
    from limner.runtime import config as cfgmod

    bad = tmp_path / "r.toml"
    bad.write_text(body)
    with pytest.raises(cfgmod.ConfigError, match=message):
        cfgmod.load(Recipe, bad)


def test_training_device_is_checked_before_any_work():
    """`device = "cuda"` on a machine where torch sees no CUDA device is refused by name;
    `auto` falls back to the CPU (torch.cuda.is_available, torch's own check)."""
    from limner.compress.distributed import DistributedError, train_device

    assert train_device("cpu") == torch.device("cpu")
    n = torch.cuda.device_count() if torch.cuda.is_available() else 0
    assert train_device("auto").type == ("cuda" if n else "cpu")
    with pytest.raises(DistributedError, match=f"device='cuda:{n}'"):
        train_device(f"cuda:{n}")


@pytest.mark.parametrize("case", ["missing teacher", "not a teacher", "no content", "wrong suffix"])
def test_bad_inputs_leave_no_output_folder(case, teacher_onnx, tmp_path):
    """A bad teacher or content is refused by name before OUT (recipe.toml, work/) is made."""
    student = tmp_path / "s.pt"
    ck.save(ck.from_model(build("student", width=0.25, blocks=1), {}), student)
    teacher = {"missing teacher": tmp_path / "none.pt", "not a teacher": student,
               "no content": teacher_onnx, "wrong suffix": tmp_path / "t.txt"}[case]
    content = [str(tmp_path / "nothing-here")] if case == "no content" else PHOTOS
    out = tmp_path / "out"
    r = subprocess.run([PY, "-m", "limner.runtime.cli", "compress", str(teacher), "--content", *content,
                        "-o", str(out)], capture_output=True, text=True, timeout=300)
    assert r.returncode == 1, r.stderr
    assert "Traceback" not in r.stderr and r.stderr.strip().startswith("limner compress: error:")
    assert not out.exists()


def test_a_family_registered_once_is_built_configured_and_pruned_by_name(monkeypatch, tmp_path):
    """One Family entry is all the recipe, the builder, the checkpoint and the pruner need
    (compress/registry.py); a family without channel spaces is refused by name for pruning."""
    from dataclasses import replace

    from limner.compress import registry
    from limner.compress.recipe import Recipe
    from limner.runtime import config as cfgmod

    plain = registry.FAMILIES["student"]
    monkeypatch.setitem(registry.FAMILIES, "rigid", replace(plain, name="rigid", spaces=None, shrunk=None))
    monkeypatch.setitem(registry.FAMILIES, "student", plain)
    rec = tmp_path / "r.toml"
    rec.write_text('[[student]]\nname = "s"\nfamily = "rigid"\nknobs = {width = 0.25, blocks = 1}\n'
                   '[[prune]]\nname = "p"\nparent = "s"\n')
    with pytest.raises(cfgmod.ConfigError, match="parent 's' is of the rigid family, which cannot be pruned"):
        cfgmod.load(Recipe, rec)
    rec.write_text('[[student]]\nname = "s"\nfamily = "student"\nknobs = {width = 0.25, blocks = 1}\n'
                   '[[prune]]\nname = "p"\nparent = "s"\nratio = 0.5\n')
    r = cfgmod.load(Recipe, rec)
    net = registry.build(r.student[0].family, **r.student[0].knobs)
    small = prune(net, 0.5)
    assert registry.family_of(small) == "student"
    assert abs(1 - conv_weight_count(small) / conv_weight_count(net) - 0.5) <= 0.05


@pytest.mark.parametrize("spread", [False, True])
def test_frame_stats_are_what_each_context_block_pools_on_the_whole_frame(spread):
    """Training hands a crop its whole frame's statistics (Student.frame_stats); run on the
    whole frame itself with those statistics, the student must give exactly what it gives
    pooling for itself, as the exported model does at run time, at every context block."""
    torch.manual_seed(0)
    net = build("student", **asdict(PRESETS["s-half"]) | {"context": True, "context_blocks": True,
                                                           "context_spread": spread}).eval()
    for m in net.modules():  # context blocks start as the identity: give them an effect
        if isinstance(m, FrameFiLM):
            for c in (m.gamma, m.beta) + ((m.spread,) if spread else ()):
                c.weight.data.normal_(0, 0.5)
    frame = torch.rand(2, 3, 64, 96)
    frame[:, :, :, 48:] += 2.0               # a bright right half: frame and crop statistics differ
    stats = net.frame_stats(frame)
    assert len(stats) == len(net.context_points) == 1 + len(net.model_args["hidden"])
    c3 = net.model_args["channels"][2]
    assert all(s.shape == (2, 2 * c3 if spread else c3, 1, 1) for s in stats)
    with torch.no_grad():
        assert torch.allclose(net(frame, stats=stats), net(frame), atol=1e-6)
        crop = frame[:, :, 16:48, 0:32]
        # a crop with its frame's statistics differs from the crop pooling for itself
        assert (net(crop, frame=frame) - net(crop)).abs().max() > 1e-3
        with pytest.raises(ValueError):  # one statistic per context block, no fewer
            net(crop, stats=stats[:1])


def test_distillation_stops_before_a_non_finite_step_and_keeps_its_checkpoint(tmp_path, monkeypatch):
    """A run whose loss turns non-finite (here injected at the sixth step) must stop with an
    error naming the step, before the update that would poison the weights, so the checkpoint
    on disk stays finite and a rerun with a lower learning rate resumes from it (common
    practice for training loops, no source)."""
    from limner.compress import distill as distill_mod
    from limner.compress.distill import distill
    from limner.compress.errors import CompressError
    from limner.compress.lossnet import build_loss_net
    from limner.compress.recipe import LossWeights, Recipe

    rng = np.random.default_rng(0)
    cache = {"inputs": rng.integers(0, 256, (16, 64, 64, 3), dtype=np.uint8),
             "targets": rng.integers(0, 256, (16, 64, 64, 3), dtype=np.uint8)}
    recipe = Recipe(crop=64, batch=2, checkpoint_every=2, target_frame="",
                    loss=LossWeights(feature=0.0, gram=0.0))
    lossnet, _ = build_loss_net("random", seed=0)
    terms, calls = distill_mod.DistillLoss.terms, []

    def poisoned(self, *args, **kwargs):
        out = terms(self, *args, **kwargs)
        calls.append(1)
        if len(calls) == 6:
            out["pixel_l1"] = out["pixel_l1"] * float("nan")
        return out

    monkeypatch.setattr(distill_mod.DistillLoss, "terms", poisoned)
    torch.manual_seed(0)
    net = build("student", **asdict(PRESETS["s-tiny"]))
    with pytest.raises(CompressError, match=r"step 5: the loss or its gradient is not finite.*step 4 is kept"):
        distill(net, cache, recipe, 20, 1e-3, lossnet, tmp_path, "diverging", {"name": "d"})
    saved = ck.load(tmp_path / "checkpoint.pt")
    assert saved.train_state["step"] == 4
    assert all(torch.isfinite(v).all() for v in saved.state_dict.values())
    assert all(torch.isfinite(p).all() for p in net.parameters())   # no poisoned update either
