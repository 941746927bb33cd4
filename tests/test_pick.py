"""`limner pick` on a crafted report (a worked example: the expected choice follows
from the rule "fastest model meeting every threshold" by hand)."""
from __future__ import annotations

import json
import subprocess

import pytest

from limner.bench.pick import PickError, pick

from conftest import PY


def _row(name, fps, ms, de, warp, precision="fp32", teacher=False, share=None):
    q = lambda v: {"mean": v, "worst": v}  # noqa: E731
    return {"path": f"/models/{name}.onnx", "name": name, "role": "teacher" if teacher else "student",
            "precision": precision, "is_teacher": teacher,
            "speed": [{"resolution": "640x360", "threads": 2, "fps": fps, "p50_ms": 1000 / fps},
                      {"resolution": "320x192", "threads": 2, "fps": fps * 3, "p50_ms": 300 / fps}],
            "fidelity": None if teacher else {"ms_ssim": q(ms), "ssim": q(ms - 0.1), "delta_e": q(de),
                                              "psnr": q(25.0)},
            "stability": {"noise_ms_ssim": 0.95, "warp_error": warp},
            "style": None if share is None else {"style_share": q(share), "content_similarity": q(0.7)}}


@pytest.fixture
def report(tmp_path):
    rep = {"schema": 1, "config": {"plot_resolution": "640x360"}, "resolutions": ["320x192", "640x360"],
           "floor": {"ms_ssim": {"mean": 0.90}, "ssim": {"mean": 0.85}, "delta_e": {"mean": 4.0},
                     "psnr": {"mean": 30.0}},
           "models": [_row("teacher", 2.3, 1, 0, 0.004, teacher=True, share=0.30),
                      _row("wide", 20.0, 0.88, 5.0, 0.003, share=0.35),
                      _row("mid", 35.0, 0.83, 7.0, 0.003, share=0.42),
                      _row("mid-int8", 41.0, 0.81, 7.5, 0.003, "int8", share=0.47),
                      _row("tiny", 70.0, 0.72, 11.0, 0.002, share=0.60)]}
    (tmp_path / "report.json").write_text(json.dumps(rep))
    return tmp_path


def test_fastest_qualifying_model_is_chosen(report):
    r = pick(report, min_fps=30, min_ms_ssim=0.8)
    assert r.chosen["name"] == "mid-int8"  # mid and mid-int8 qualify; mid-int8 is faster
    r = pick(report, min_fps=30, min_ms_ssim=0.82)
    assert r.chosen["name"] == "mid"
    r = pick(report, min_fps=60)
    assert r.chosen["name"] == "tiny"


def test_thresholds_relative_to_the_teacher_floor(report):
    # floor*2 for delta E: 2 * 4.0 = 8.0 -> mid-int8 (7.5) qualifies, tiny (11) does not
    assert pick(report, min_fps=30, max_delta_e="floor*2").chosen["name"] == "mid-int8"
    # floor-0.05 for MS-SSIM: 0.85 -> only wide (0.88) and the teacher qualify; wide is faster
    assert pick(report, min_ms_ssim="floor-0.05").chosen["name"] == "wide"


def test_style_share_threshold_relative_to_the_teacher(report):
    # teacher*1.5 = 0.45: mid (0.42) qualifies, mid-int8 (0.47) and tiny (0.60) do not
    assert pick(report, min_fps=30, max_style_share="teacher*1.5").chosen["name"] == "mid"
    assert pick(report, max_style_share=0.5).chosen["name"] == "mid-int8"
    with pytest.raises(PickError, match="no teacher noise floor"):
        pick(report, max_style_share="floor")


def test_resolution_choice(report):
    # at 320x192 every model runs 3x faster: wide reaches 60 fps there
    assert pick(report, min_fps=50, min_ms_ssim=0.85, resolution="320x192").chosen["name"] == "wide"


def test_nothing_qualifies_lists_nearest_misses(report):
    r = pick(report, min_fps=50, min_ms_ssim=0.85)
    assert r.chosen is None
    text = "\n".join(r.lines)
    assert "no model meets all thresholds at 640x360" in text
    assert "fps: wide reaches 20 (needs >= 50; meets the others)" in text
    assert "MS-SSIM: tiny reaches 0.72 (needs >= 0.85; meets the others)" in text


def test_cli_exit_codes(report):
    ok = subprocess.run([PY, "-m", "limner.runtime.cli", "pick", str(report), "--min-fps", "30",
                         "--min-ms-ssim", "0.8"], capture_output=True, text=True, timeout=60)
    assert ok.returncode == 0 and ok.stdout.splitlines()[0] == "/models/mid-int8.onnx"
    bad = subprocess.run([PY, "-m", "limner.runtime.cli", "pick", str(report), "--min-fps", "500"],
                         capture_output=True, text=True, timeout=60)
    assert bad.returncode == 1 and "nearest misses" in bad.stderr


def test_bad_inputs_are_named(report, tmp_path):
    with pytest.raises(PickError, match="--min-ms-ssim 'flor'"):
        pick(report, min_ms_ssim="flor")
    with pytest.raises(PickError, match="no report.json"):
        pick(tmp_path / "nowhere")
    with pytest.raises(PickError, match="--resolution 1920x1080"):
        pick(report, min_fps=1, resolution="1920x1080")


def test_plot_labels_in_a_cluster_do_not_overlap():
    """Labels of models at nearly the same (quality, fps) are moved apart (common practice
    for scatter labels, no source); matplotlib measures the boxes."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from limner.bench.plots import place_labels

    fig, ax = plt.subplots(figsize=(8, 5.5), dpi=110)
    pts = [(0.74 + 0.001 * k, 18.0 + 0.2 * k) for k in range(6)] + [(0.62, 47.0), (1.0, 0.7)]
    ax.scatter(*zip(*pts))
    ax.set_yscale("log")
    ax.set_xlim(0.6, 1.0)
    boxes = place_labels(fig, ax, pts, [f"half-ctx-variant-{k}" for k in range(len(pts))], marker_pt=6.8)
    r = 3.4 * fig.dpi / 72
    markers = [(x - r, y - r, x + r, y + r) for x, y in ax.transData.transform(pts)]
    plt.close(fig)
    assert len(boxes) == len(pts)
    assert not any(a.overlaps(b) for i, a in enumerate(boxes) for b in boxes[i + 1:])
    # no label covers a marker, and none runs off the figure (the point at x = 1.0 sits on
    # the right edge of the axes: its label must go to the left)
    assert not any(b.x0 < m[2] and m[0] < b.x1 and b.y0 < m[3] and m[1] < b.y1
                   for b in boxes for m in markers)
    assert all(0 <= b.x0 and b.x1 <= 8 * 110 for b in boxes)


def test_pareto_plot_labels_clear_in_the_saved_figure(tmp_path):
    """The labels are placed in the figure's final layout (log scale, margins, legend), so
    in the saved figure no label covers another, a marker, the legend or the title. A
    made-up ladder of 17 models, clustered the way a real one is (layout check only)."""
    from limner.bench.plots import pareto_plot

    def model(name, q, fps, prec="fp32", teacher=False):
        return {"name": name, "precision": prec, "is_teacher": teacher,
                "speed": [{"resolution": "640x360", "threads": 2, "fps": fps}],
                "fidelity": None if teacher else {"ms_ssim": {"mean": q}}}

    models = [model("teacher", 1.0, 0.85, teacher=True)]
    for k in range(6):
        models.append(model(f"half-ctx-{k}", 0.740 + 0.002 * k, 18.0 + 0.4 * k))
        models.append(model(f"half-ctx-{k}-int8", 0.738 + 0.002 * k, 16.5 + 0.4 * k, "int8"))
    for k in range(4):  # a cluster at the top of the axes: stacked labels reach the title
        models.append(model(f"tiny-{k}", 0.67 + 0.002 * k, 49.0 - 1.5 * k, "int8" if k % 2 else "fp32"))
    rep = {"config": {"quality_axis": "ms_ssim", "plot_resolution": "640x360", "min_fps": 30,
                      "min_ms_ssim": 0.8},
           "resolutions": ["640x360"], "models": models, "floor": {"ms_ssim": {"mean": 0.978}},
           "machine": {"cpu": "test", "cores": 2, "onnxruntime": "x"}}
    labels, markers, frame = pareto_plot(rep, tmp_path / "pareto.png")
    assert len(labels) == len(markers) == len(models)
    # every label inside the axes (so clear of the title above them) and off the legend
    assert all(frame["axes"].x0 <= b.x0 and b.x1 <= frame["axes"].x1 and
               frame["axes"].y0 <= b.y0 and b.y1 <= frame["axes"].y1 for b in labels)
    assert not any(b.overlaps(frame["legend"]) or b.overlaps(frame["title"]) for b in labels)
    assert not any(a.overlaps(b) for i, a in enumerate(labels) for b in labels[i + 1:])
    assert not any(a.overlaps(m) for a in labels for m in markers)
    assert (tmp_path / "pareto.png").stat().st_size > 10_000
