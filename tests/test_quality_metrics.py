"""Bench metrics against outside references: scikit-image, OpenCV, pytorch-msssim,
and the published CIEDE2000 test data of Sharma, Wu & Dalal 2005."""
from __future__ import annotations

import csv
from pathlib import Path

import cv2
import numpy as np
import pytest

from limner.runtime.viewing import ViewingGeometry
from limner.bench.color import (ciede2000, scielab_delta_e, scielab_kernels,
                                xyz_to_lab, bgr8_to_xyz)
from limner.bench.metrics import ms_ssim, ms_ssim_scales, psnr, ssim
from limner.bench.stability import warp_error

# Published test data (Sharma, Wu & Dalal 2005, Table 1), kept with its citation header
SHARMA = Path(__file__).resolve().parent / "data" / "ciede2000_sharma2005.csv"


def _degraded(img: np.ndarray, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    blurred = cv2.GaussianBlur(img, (5, 5), 1.2).astype(np.float64)
    return np.clip(blurred + rng.normal(0, 6, img.shape), 0, 255).astype(np.uint8)


@pytest.mark.parametrize("name", ["fruits", "coffee", "chelsea"])
def test_ssim_matches_scikit_image(photos, name):
    from skimage.metrics import structural_similarity

    a = photos[name][:300, :400]
    b = _degraded(a, 1)
    # scikit-image documents these arguments as matching Wang et al. 2004
    ref = structural_similarity(a, b, gaussian_weights=True, sigma=1.5, use_sample_covariance=False,
                                data_range=255, channel_axis=2)
    assert ssim(a, b) == pytest.approx(ref, abs=1e-6)


@pytest.mark.parametrize("name", ["fruits", "coffee", "squirrel"])
def test_ms_ssim_matches_pytorch_msssim(photos, name):
    """pytorch-msssim (PyPI) implements Wang, Simoncelli & Bovik 2003 with the same
    five weights; it is the reference implementation here."""
    import torch
    from pytorch_msssim import ms_ssim as ref_ms_ssim

    a = photos[name][:361, :481]  # odd sides exercise the padded downsampling
    b = _degraded(a, 2)
    t = lambda x: torch.from_numpy(np.ascontiguousarray(x)).permute(2, 0, 1)[None].double()  # noqa: E731
    ref = float(ref_ms_ssim(t(a), t(b), data_range=255))
    assert ms_ssim(a, b) == pytest.approx(ref, abs=1e-3)


def test_ms_ssim_coarsest_scale_is_ssim_of_the_pooled_images(photos):
    """The per-scale terms (tools/scale_report.py): the fifth is plain SSIM after four 2x2
    average poolings (Wang, Simoncelli & Bovik 2003), checked against scikit-image's SSIM of
    the 16x-pooled pair; they multiply back to ms_ssim with the paper's exponents."""
    from skimage.metrics import structural_similarity

    a = photos["fruits"][:352, :480]
    b = _degraded(a, 4)
    pool = lambda x: x.astype(np.float64).reshape(22, 16, 30, 16, 3).mean(axis=(1, 3))  # noqa: E731
    terms = ms_ssim_scales(a, b)
    assert terms.shape == (3, 5)
    for c in range(3):
        ref = structural_similarity(pool(a)[:, :, c], pool(b)[:, :, c], gaussian_weights=True, sigma=1.5,
                                    use_sample_covariance=False, data_range=255)
        assert terms[c, 4] == pytest.approx(ref, abs=1e-9)
    weights = np.array([0.0448, 0.2856, 0.3001, 0.2363, 0.1333])   # the paper's exponents
    assert ms_ssim(a, b) == pytest.approx(float(np.mean(np.prod(terms ** weights, axis=1))), abs=1e-12)


def test_psnr_matches_scikit_image_and_opencv(photos):
    from skimage.metrics import peak_signal_noise_ratio

    a = photos["coffee"]
    b = _degraded(a, 3)
    assert psnr(a, b) == pytest.approx(peak_signal_noise_ratio(a, b, data_range=255), abs=1e-9)
    assert psnr(a, b) == pytest.approx(cv2.PSNR(a, b), abs=1e-9)


def _sharma_rows():
    lines = [l for l in SHARMA.read_text().splitlines() if not l.startswith("#")]
    rows = list(csv.DictReader(lines))
    lab1 = np.array([[float(r[k]) for k in ("L1", "a1", "b1")] for r in rows])
    lab2 = np.array([[float(r[k]) for k in ("L2", "a2", "b2")] for r in rows])
    return lab1, lab2, np.array([float(r["dE00"]) for r in rows])


def test_ciede2000_reproduces_sharma_2005_test_pairs():
    lab1, lab2, expected = _sharma_rows()
    assert len(expected) == 34
    # the published values are rounded to 4 decimals
    assert np.abs(ciede2000(lab1, lab2) - expected).max() <= 1e-4
    assert np.abs(ciede2000(lab2, lab1) - expected).max() <= 1e-4  # symmetric


def test_ciede2000_agrees_with_scikit_image(photos):
    from skimage.color import deltaE_ciede2000, rgb2lab

    a, b = photos["fruits"][:64, :64], photos["coffee"][:64, :64]
    la, lb = rgb2lab(a[:, :, ::-1]), rgb2lab(b[:, :, ::-1])
    assert np.abs(ciede2000(la, lb) - deltaE_ciede2000(la, lb)).max() < 1e-9
    # our sRGB -> Lab against scikit-image's (both IEC 61966-2-1, D65)
    assert np.abs(xyz_to_lab(bgr8_to_xyz(a)) - la).max() < 0.05


def test_scielab_identical_images_give_zero(photos):
    img = photos["chelsea"][:180, :320]
    assert scielab_delta_e(img, img, ppd=19.0) == 0.0


def test_scielab_filters_each_sum_to_one():
    for comps in scielab_kernels(ppd=25.0, max_radius=10_000):
        total = sum(w * k.sum() ** 2 for w, k in comps)  # 2-D kernel = outer(k, k)
        assert total == pytest.approx(1.0, abs=1e-9)


def test_scielab_checkerboard_fades_with_distance():
    """A fine black/white checkerboard against its mean grey: the eye blurs it away
    from far off (Zhang & Wandell 1997's purpose), so the difference must shrink."""
    cb = (np.indices((120, 160)).sum(0) % 2 * 255).astype(np.uint8)
    cb = np.repeat(cb[:, :, None], 3, axis=2)
    grey = np.full_like(cb, 188)  # sRGB 188 is about half the linear light of white
    near = scielab_delta_e(cb, grey, ViewingGeometry(1.2, 0.5).pixels_per_degree(160))
    far = scielab_delta_e(cb, grey, ViewingGeometry(1.2, 8.0).pixels_per_degree(160))
    assert far < near / 3


def _pan(img: np.ndarray, n: int, step: int) -> list[np.ndarray]:
    return [np.ascontiguousarray(img[40:280, 30 + step * i: 350 + step * i]) for i in range(n)]


def test_warp_error_zero_for_identical_frames(photos):
    f = _pan(photos["coffee"], 1, 0)[0]
    assert warp_error([f, f, f], [f, f, f]) < 1e-6  # zero up to float rounding of the flow


def test_warp_error_near_zero_for_integer_translation_and_grows_with_flicker(photos):
    frames = _pan(photos["coffee"], 4, 3)
    steady = warp_error(frames, frames)
    rng = np.random.default_rng(0)
    flicker = [np.clip(f.astype(int) + rng.normal(0, 12, f.shape), 0, 255).astype(np.uint8) for f in frames]
    noisy = warp_error(frames, flicker)
    assert steady < 1e-3
    assert noisy > 10 * steady and noisy > 0.005
