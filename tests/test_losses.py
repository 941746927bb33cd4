"""Perceptual losses and the loss-network loader."""
from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F

from limner.compress.losses import content_loss, gram, style_loss_layer
from limner.compress.lossnet import LossNetError, build_loss_net


def test_gram_of_hand_worked_feature_map():
    # F: C=2 channels over H*W = 1*2 positions: ch0 = [1, 2], ch1 = [3, 4]
    # F F^T = [[1*1+2*2, 1*3+2*4], [3*1+4*2, 3*3+4*4]] = [[5, 11], [11, 25]]
    # normalised by C*H*W = 2*1*2 = 4 (Johnson et al. 2016, eq. 3)
    f = torch.tensor([[[[1.0, 2.0]], [[3.0, 4.0]]]])
    assert torch.allclose(gram(f), torch.tensor([[[1.25, 2.75], [2.75, 6.25]]]))


@pytest.fixture(scope="module")
def net():
    return build_loss_net("random", seed=3)[0]


def _style_loss(net, y, style):
    fs, fy = net(style), net(y)
    return sum(float(style_loss_layer(fy[k], gram(fs[k]))) for k in fs)


def test_style_loss_zero_for_itself_and_grows_under_colour_shift(net, photos):
    img = torch.from_numpy(photos["coffee"][:128, :128, ::-1].copy()).permute(2, 0, 1)[None].float() / 255
    assert _style_loss(net, img, img) == 0.0
    shifted = (img + torch.tensor([0.15, -0.1, 0.0]).view(1, 3, 1, 1)).clamp(0, 1)
    more = (img + torch.tensor([0.3, -0.2, 0.0]).view(1, 3, 1, 1)).clamp(0, 1)
    small, large = _style_loss(net, shifted, img), _style_loss(net, more, img)
    assert 0 < small < large


def test_content_loss_zero_for_identical_and_invariant_to_style(net, photos):
    from limner.runtime.styles import ember, woodcut
    from limner.compress.train import PerceptualLoss, TrainConfig

    x = torch.from_numpy(photos["chelsea"][:96, :96, ::-1].copy()).permute(2, 0, 1)[None].float() / 255
    f = net(x)["relu2_2"]
    assert float(content_loss(f, f)) == 0.0
    y = x.flip(3)
    cfg = TrainConfig(size=96)
    a = PerceptualLoss(cfg, net, ember(128)[:, :, ::-1].copy()).terms(y, x)
    b = PerceptualLoss(cfg, net, woodcut(128)[:, :, ::-1].copy()).terms(y, x)
    assert float(a["content"]) > 0 and float(a["content"]) == float(b["content"])
    assert float(a["style_relu2_2"]) != float(b["style_relu2_2"])  # the style term does see it


def test_loader_maps_standard_vgg16_state_dict_exactly(tmp_path):
    """A state dict in the common PyTorch VGG-16 layout (features.N.*, classifier.*),
    built here with random values and saved with torch.save, lands on the extractor
    exactly: relu1_2 equals a manual F.conv2d pipeline with those weights."""
    g = torch.Generator().manual_seed(0)
    convs = [(0, 3, 64), (2, 64, 64), (5, 64, 128), (7, 128, 128), (10, 128, 256), (12, 256, 256),
             (14, 256, 256), (17, 256, 512), (19, 512, 512), (21, 512, 512), (24, 512, 512),
             (26, 512, 512), (28, 512, 512)]
    sd = {}
    for i, cin, cout in convs:
        sd[f"features.{i}.weight"] = torch.randn(cout, cin, 3, 3, generator=g) * 0.05
        sd[f"features.{i}.bias"] = torch.randn(cout, generator=g) * 0.05
    sd["classifier.0.weight"] = torch.randn(8, 8, generator=g)  # ignored
    path = tmp_path / "vgg16.pth"
    torch.save(sd, path)
    net, source = build_loss_net("vgg16", weights=path)
    assert source.kind == "vgg16" and len(source.sha256) == 64
    x = torch.rand(1, 3, 32, 32, generator=g)
    # ImageNet mean/std of the common PyTorch VGG weights (common practice, no source)
    h = (x - torch.tensor([0.485, 0.456, 0.406]).view(1, 3, 1, 1)) / torch.tensor([0.229, 0.224, 0.225]).view(1, 3, 1, 1)
    h = F.relu(F.conv2d(h, sd["features.0.weight"], sd["features.0.bias"], padding=1))
    h = F.relu(F.conv2d(h, sd["features.2.weight"], sd["features.2.bias"], padding=1))
    assert torch.allclose(net(x, upto="relu1_2")["relu1_2"], h, atol=1e-6)


def test_loader_errors_name_the_problem(tmp_path):
    p = tmp_path / "bad.pth"
    torch.save({"features.0.weight": torch.zeros(64, 3, 3, 3)}, p)
    with pytest.raises(LossNetError, match="missing key 'features.0.bias'"):
        build_loss_net("vgg16", weights=p)
    with pytest.raises(LossNetError, match="no such loss-network weight file"):
        build_loss_net("vgg16", weights=tmp_path / "none.pth")


def test_offline_download_fails_fast_with_instructions(tmp_path, monkeypatch):
    import time

    monkeypatch.setattr(torch.hub, "get_dir", lambda: str(tmp_path / "hub"))
    import limner.compress.lossnet as ln
    monkeypatch.setattr(ln, "HUB_URL", "http://127.0.0.1:9/vgg16.pth")  # closed port: offline
    t = time.monotonic()
    with pytest.raises(LossNetError, match="--loss-weights FILE.*--loss-net hed.*--loss-net random"):
        build_loss_net("vgg16", download_timeout_s=3)
    assert time.monotonic() - t < 10


def test_random_loss_net_is_seeded():
    a, sa = build_loss_net("random", seed=5)
    b, _ = build_loss_net("random", seed=5)
    assert sa.describe() == "vgg16-random:seed=5"
    assert torch.equal(a.convs["conv1_1"].weight, b.convs["conv1_1"].weight)
