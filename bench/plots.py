"""The Pareto plot: fps against quality loss, frontier marked, thresholds drawn."""
from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
from matplotlib.text import Text  # noqa: E402
from matplotlib.transforms import Bbox  # noqa: E402

from .axes import QUALITY, quality_value, speed_at  # noqa: E402

MARKER_PT = 6.8  # marker diameter in points (scatter size is its square)
COLOURS = {"fp32": "#1f77b4", "int8": "#d62728"}


def frontier(points: list[tuple[float, float]], higher_better: bool) -> list[int]:
    """Indices of points not dominated in (quality, fps)."""
    keep = []
    for i, (q, f) in enumerate(points):
        dominated = any((q2 >= q if higher_better else q2 <= q) and f2 >= f and (q2, f2) != (q, f)
                        for q2, f2 in points)
        if not dominated:
            keep.append(i)
    return keep


def _marker_boxes(fig, ax, pts: list[tuple[float, float]], marker_pt: float) -> list:
    r = marker_pt / 2 * fig.dpi / 72
    return [Bbox.from_extents(x - r, y - r, x + r, y + r) for x, y in ax.transData.transform(pts)]


def place_labels(fig, ax, pts: list[tuple[float, float]], names: list[str],
                 marker_pt: float = 0.0) -> list:
    """Label each point beside it; where a label would overlap one already placed, try
    places above and below it (then on its left), with a thin leader line once it is
    away from its point. Models of similar speed and quality sit in clusters, where
    labels at one fixed offset print over each other. Markers of diameter `marker_pt`
    (points) and the legend are kept clear as well, and labels stay inside the axes, below
    the title. Call it once the
    axes are final (scales, limits, layout): the boxes are measured in display
    coordinates. Returns the labels' boxes."""
    fig.canvas.draw()  # fixes the axes limits and transforms the boxes are measured in
    renderer = fig.canvas.get_renderer()
    markers = _marker_boxes(fig, ax, pts, marker_pt)
    legend = ax.get_legend()
    if legend is not None:
        markers.append(legend.get_window_extent(renderer))
    area = ax.bbox
    steps = [0.0] + [d * k for k in range(1, 12) for d in (-1.0, 1.0)]
    tries = [(6.0, 4.0 + 11.0 * k) for k in steps] + [(-6.0, 4.0 + 11.0 * k) for k in steps]
    placed = []
    for i in sorted(range(len(pts)), key=lambda k: -pts[k][1]):
        for n, (dx, dy) in enumerate(tries):
            far = n > 0
            t = ax.annotate(names[i], pts[i], textcoords="offset points", xytext=(dx, dy), fontsize=8,
                            ha="left" if dx > 0 else "right",
                            arrowprops=dict(arrowstyle="-", lw=0.5, color="#888888", shrinkA=0, shrinkB=3)
                            if far else None)
            t.update_positions(renderer)
            box = Text.get_window_extent(t, renderer)  # the text alone, not its leader line
            inside = area.x0 <= box.x0 and box.x1 <= area.x1 and area.y0 <= box.y0 and box.y1 <= area.y1
            if (inside and not any(box.overlaps(b) for b in placed + markers)) or n == len(tries) - 1:
                break
            t.remove()
        placed.append(box)
    return placed


def pareto_plot(rep: dict, path: Path) -> tuple[list, list, dict]:
    """Writes the plot; returns the label boxes, the marker boxes and the boxes of the axes,
    legend and title as saved (display coordinates), for checking that no label covers
    another label, a marker, the legend or the title."""

    cfg = rep["config"]
    axis, res = cfg["quality_axis"], cfg["plot_resolution"]
    res = next((r for r in rep["resolutions"] if r.split("x")[0] == res.split("x")[0]), rep["resolutions"][0])
    hib = QUALITY[axis].higher
    pts, rows = [], []
    for r in rep["models"]:
        s = speed_at(r, res)
        if s:
            pts.append((quality_value(r, axis), s["fps"]))
            rows.append(r)
    fig, ax = plt.subplots(figsize=(8, 5.5), dpi=110)
    for prec, col in COLOURS.items():
        xs = [p[0] for p, r in zip(pts, rows) if r["precision"] == prec]
        ys = [p[1] for p, r in zip(pts, rows) if r["precision"] == prec]
        if xs:
            ax.scatter(xs, ys, c=col, s=MARKER_PT ** 2, label=prec, zorder=3)
    front = sorted((pts[i] for i in frontier(pts, hib)), key=lambda p: p[0])
    if len(front) > 1:
        ax.step([p[0] for p in front], [p[1] for p in front], where="post" if not hib else "pre",
                color="#555555", lw=1.2, ls="-", zorder=2, label="Pareto frontier")
    floor = rep["floor"][axis]["mean"]
    ax.axvline(floor, color="#2ca02c", ls=":", lw=1.3, label=f"teacher's noise floor ({floor:.3g})")
    ax.axhline(cfg["min_fps"], color="#ff7f0e", ls="--", lw=1.1, label=f"min fps {cfg['min_fps']:g}")
    if axis == "ms_ssim":
        ax.axvline(cfg["min_ms_ssim"], color="#9467bd", ls="--", lw=1.1,
                   label=f"min MS-SSIM {cfg['min_ms_ssim']:g}")
    ax.set_yscale("log")
    ax.set_xlabel(QUALITY[axis].axis_label())
    ax.set_ylabel(f"frames per second at {res} (log scale)")
    m = rep["machine"]
    ax.set_title(f"fps against quality loss: {m['cpu']}, {m['cores']} cores, onnxruntime {m['onnxruntime']}",
                 fontsize=9)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8, loc="best")
    fig.tight_layout()
    # last: the labels are placed in the final layout (log scale, margins)
    names = [r["name"] + (" (teacher)" if r["is_teacher"] and r["name"] != "teacher" else "") for r in rows]
    place_labels(fig, ax, pts, names, marker_pt=MARKER_PT)
    fig.savefig(path)
    renderer = fig.canvas.get_renderer()
    labels = [Text.get_window_extent(t, renderer) for t in ax.texts]
    markers = _marker_boxes(fig, ax, pts, MARKER_PT)
    frame = {"axes": ax.bbox.frozen(), "legend": ax.get_legend().get_window_extent(renderer),
             "title": ax.title.get_window_extent(renderer)}
    plt.close(fig)
    return labels, markers, frame
