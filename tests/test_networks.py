"""Network shapes, parameter counts and MACs against hand arithmetic from the
published layer table (Johnson et al. 2016, supplementary material, Table 1)."""
from __future__ import annotations

from dataclasses import asdict

import pytest
import torch

from limner.compress.layer_table import conv_macs
from limner.compress.macs import count_macs, count_params
from limner.compress.registry import build, rebuild
from limner.compress.students import PRESETS, StudentKnobs


def test_teacher_parameter_count_matches_layer_table():
    # Johnson et al. 2016 layer table; conv weights k*k*cin*cout + cout biases,
    # instance norm affine 2*C per norm.
    conv_in = 9 * 9 * 3 * 32 + 32 + 2 * 32            # 7,872
    down1 = 3 * 3 * 32 * 64 + 64 + 2 * 64             # 18,624
    down2 = 3 * 3 * 64 * 128 + 128 + 2 * 128          # 74,112
    block = 2 * (3 * 3 * 128 * 128 + 128 + 2 * 128)   # 295,680
    up1 = 3 * 3 * 128 * 64 + 64 + 2 * 64              # 73,920 (resize + conv: same count as the
    up2 = 3 * 3 * 64 * 32 + 32 + 2 * 32               # 18,528  published fractionally strided conv)
    conv_out = 9 * 9 * 32 * 3 + 3                     # 7,779 (no norm on the output conv)
    expected = conv_in + down1 + down2 + 5 * block + up1 + up2 + conv_out
    assert expected == 1_679_235
    assert count_params(build("teacher")) == expected


def test_teacher_macs_at_256_match_hand_arithmetic():
    hw = 256 * 256
    macs = (hw * 9 * 9 * 3 * 32                       # conv in at 256x256
            + hw // 4 * 3 * 3 * 32 * 64               # stride-2 to 128x128
            + hw // 16 * 3 * 3 * 64 * 128             # stride-2 to 64x64
            + 10 * hw // 16 * 3 * 3 * 128 * 128       # 5 blocks x 2 convs at 64x64
            + hw // 4 * 3 * 3 * 128 * 64              # resize to 128x128 + conv
            + hw * 3 * 3 * 64 * 32                    # resize to 256x256 + conv
            + hw * 9 * 9 * 32 * 3)                    # conv out
    assert macs == 10_078_912_512  # "about 10.08 GMACs" (docs/architecture.md, Networks)
    assert count_macs(build("teacher"), 256, 256) == macs


def test_single_conv_macs_hand_arithmetic():
    conv = torch.nn.Conv2d(16, 32, 3, padding=1)
    assert conv_macs(conv, 10, 20) == 10 * 20 * 32 * 16 * 9
    dw = torch.nn.Conv2d(16, 16, 3, padding=1, groups=16)
    assert conv_macs(dw, 10, 20) == 10 * 20 * 16 * 1 * 9


@pytest.mark.parametrize("name", sorted(PRESETS))
def test_student_presets_keep_shape_and_rebuild(name):
    knobs = asdict(PRESETS[name])
    net = build("student", **knobs).eval()
    m = net.size_multiple
    x = torch.rand(1, 3, 3 * m * 4, 5 * m * 2)
    with torch.no_grad():
        y = net(x)
    assert y.shape == x.shape and float(y.min()) >= 0 and float(y.max()) <= 1
    again = rebuild("student", net.model_args)
    again.load_state_dict(net.state_dict())
    with torch.no_grad():
        assert torch.equal(again(x), y)


def test_students_are_int8_friendly():
    # docs/architecture.md: no instance norm and zero padding in students
    for knobs in PRESETS.values():
        net = build("student", **asdict(knobs))
        assert not any(isinstance(m, torch.nn.InstanceNorm2d) for m in net.modules())
        assert all(m.padding_mode == "zeros" for m in net.modules() if isinstance(m, torch.nn.Conv2d))


def test_bad_knobs_are_named():
    with pytest.raises(ValueError, match="width"):
        StudentKnobs(width=5)
    with pytest.raises(ValueError, match="decoder_width=0.1"):
        StudentKnobs(decoder_width=0.1)
    with pytest.raises(ValueError, match="upsample"):
        StudentKnobs(upsample="bicubic")
    with pytest.raises(ValueError, match="unknown network family 'resnet'"):
        build("resnet")
    with pytest.raises(ValueError, match="bad knobs"):
        build("student", colour=3)
