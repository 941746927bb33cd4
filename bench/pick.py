"""`limner pick`: the fastest model in a bench report that meets the thresholds.

Quality thresholds are absolute numbers or relative to the teacher's noise floor:
`floor` (equal to it), `floor*K`, `floor+K`, `floor-K`; e.g. `--max-delta-e floor*2`.
"""
from __future__ import annotations

import json
import re
from dataclasses import dataclass, field
from pathlib import Path

from limner.runtime.errors import InputError

from .axes import QUALITY, speed_at


class PickError(InputError):
    pass


@dataclass
class Axis:
    key: str          # name used in messages
    flag: str
    higher: bool      # True: value must be >= threshold
    help: str = ""
    relative_to: str = ""  # "floor" (the teacher's noise floor) or "teacher" (its own value)

    @property
    def dest(self) -> str:
        return self.flag[2:].replace("-", "_")


# fps, every quality metric of the registry (bench/axes.py), stability and style
AXES = {"fps": Axis("fps", "--min-fps", True, "frames per second at --resolution"),
        **{k: Axis(m.label, ("--min-" if m.higher else "--max-") + k.replace("_", "-"), m.higher,
                   f"{m.label} to the teacher{', ' + m.unit if m.unit else ''}: a number, or relative "
                   "to the teacher's noise floor: floor, floor*K, floor+K, floor-K", "floor")
           for k, m in QUALITY.items()},
        "warp": Axis("warp error", "--max-warp", False, "warping error on the clip"),
        "style_share": Axis("style share", "--max-style-share", False,
                            "style share (Gram distance to the style, 1 = the photo's); a number or "
                            "relative to the teacher's, e.g. teacher*1.5", "teacher")}


@dataclass
class PickResult:
    chosen: dict | None
    lines: list[str] = field(default_factory=list)


def resolve_threshold(text: str | float | None, floor: float | None, flag: str,
                      teacher: float | None = None) -> float | None:
    """A number, or relative: `floor` (the teacher's noise floor) or `teacher` (the teacher's
    own value), optionally *K, +K or -K."""
    if text is None:
        return None
    if isinstance(text, (int, float)):
        return float(text)
    s = str(text).strip().replace(" ", "")
    try:
        return float(s)
    except ValueError:
        pass
    m = re.fullmatch(r"(floor|teacher)(?:([*+-])([0-9.]+))?", s)
    if not m:
        raise PickError(f"{flag} {text!r}: expected a number, or floor / teacher, optionally *K, +K or -K")
    base = floor if m.group(1) == "floor" else teacher
    if base is None:
        raise PickError(f"{flag} {text!r}: this metric has no {'teacher noise floor' if m.group(1) == 'floor' else 'teacher value'}")
    op, k = m.group(2), float(m.group(3)) if m.group(3) else 0.0
    return {None: base, "*": base * k, "+": base + k, "-": base - k}[op]


def model_path(rep: dict, row: dict) -> str:
    """A model's path as usable from here: reports store paths relative to their own folder."""
    import os

    p = Path(row["path"])
    return str(p) if p.is_absolute() else os.path.relpath(Path(rep.get("_dir", ".")) / p)


def load_report(path: str | Path) -> dict:
    p = Path(path)
    if p.is_dir():
        p = p / "report.json"
    if not p.is_file():
        raise PickError(f"{path}: no report.json (run `limner bench ... -o REPORT` first)")
    try:
        rep = json.loads(p.read_text())
        rep["_dir"] = str(p.parent)
    except json.JSONDecodeError as e:
        raise PickError(f"{p}: not valid JSON ({e})") from None
    if rep.get("schema") != 1:
        raise PickError(f"{p}: report schema {rep.get('schema')!r} is not one this Limner reads (1)")
    return rep


def _values(row: dict, resolution: str) -> dict[str, float | None]:
    s = speed_at(row, resolution)
    f = row["fidelity"]
    st = row["stability"]
    perfect = row["is_teacher"]
    return {"fps": s["fps"] if s else None,
            **{k: m.perfect if perfect else f[k]["mean"] for k, m in QUALITY.items()},
            "warp": st.get("warp_error"),
            "style_share": (row.get("style") or {}).get("style_share", {}).get("mean")}


def _teacher_style(rep: dict) -> float | None:
    t = next((r for r in rep["models"] if r["is_teacher"]), None)
    return _values(t, "")["style_share"] if t else None


def pick(report: str | Path, *, resolution: str | None = None, **limits: str | float | None) -> PickResult:
    """`limits` by flag name (min_fps=30, min_ms_ssim="floor-0.05", max_style_share=0.5, ...;
    one per axis in AXES); None or absent: no threshold on that axis."""
    by_dest = {a.dest: k for k, a in AXES.items()}
    unknown = sorted(set(limits) - set(by_dest))
    if unknown:
        raise PickError(f"unknown threshold {unknown[0]!r}; known: {', '.join(sorted(by_dest))}")
    for k, axis in AXES.items():  # the values' form first, before the report is read
        known = 0.0 if axis.relative_to else None
        resolve_threshold(limits.get(axis.dest), known, axis.flag, known)
    rep = load_report(report)
    res = resolution or rep["config"]["plot_resolution"]
    known = rep["resolutions"]
    match = [r for r in known if r == res] or [r for r in known if r.split("x")[0] == res.split("x")[0]]
    if not match:
        raise PickError(f"--resolution {res}: the report measured {', '.join(known)}")
    res = match[0]
    floor = rep["floor"]
    t = {}
    for k, axis in AXES.items():
        base = floor.get(k, {}).get("mean") if axis.relative_to == "floor" else None
        teacher = _teacher_style(rep) if axis.relative_to == "teacher" else None
        t[k] = resolve_threshold(limits.get(axis.dest), base, axis.flag, teacher)
    active = {k: v for k, v in t.items() if v is not None}
    if not active:
        raise PickError("give at least one threshold, e.g. --min-fps 30")

    def ok(v: float | None, k: str) -> bool:
        return v is not None and (v >= active[k] if AXES[k].higher else v <= active[k])

    rows = [(r, _values(r, res)) for r in rep["models"]]
    passing = [(r, v) for r, v in rows if all(ok(v[k], k) for k in active)]
    if passing:
        best, v = max(passing, key=lambda rv: (rv[1]["fps"] or 0.0, rv[1]["ms_ssim"]))
        why = [f"{v['fps']:.1f} fps at {res}"] + [
            f"{AXES[k].key} {v[k]:.4g} ({'>=' if AXES[k].higher else '<='} {active[k]:.4g})"
            for k in active if k != "fps"]
        lines = [model_path(rep, best), f"chosen: {best['name']} ({best['precision']}), the fastest of "
                 f"{len(passing)} qualifying model(s): " + ", ".join(why)]
        return PickResult(best, lines)
    lines = [f"no model meets all thresholds at {res}: "
             + ", ".join(f"{AXES[k].key} {'>=' if AXES[k].higher else '<='} {active[k]:.4g}" for k in active),
             "nearest misses:"]
    for k in active:
        failing = [(r, v) for r, v in rows if v[k] is not None and not ok(v[k], k)]
        others = [(r, v) for r, v in failing if all(ok(v[j], j) for j in active if j != k)]
        pool = others or failing
        if not pool:
            continue
        r, v = (max if AXES[k].higher else min)(pool, key=lambda rv: rv[1][k])
        note = "meets the others" if others else "closest on this axis alone"
        lines.append(f"  {AXES[k].key}: {r['name']} reaches {v[k]:.4g} (needs "
                     f"{'>=' if AXES[k].higher else '<='} {active[k]:.4g}; {note})")
    return PickResult(None, lines)
