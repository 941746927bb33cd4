"""Which distillation terms matter: one short run per variant, each from the same start.

Every variant starts from the same student checkpoint (`--init`), trains for `--steps`
on the same teacher-target cache with the recipe's losses, one term switched off (or
only one left, or some weights set: `with:gram=0,lowpass_l1=2` is the recipe's [loss]
with those two changed), and is then scored against the teacher on held-out photos at 640x360
with the bench's own metrics (MS-SSIM, S-CIELAB CIEDE2000 at the bench's default
viewing geometry) and, with `--style`, the bench's style share (Gram distance to the
style image over the photo's, on the trained VGG-16 trunk; the teacher's own share beside
it in every row and in the table's header). Results go to a CSV and to stdout as a table.

Usage:
  python tools/ablate_terms.py --recipe configs/compress/ember-hed.toml \\
      --cache runs/ember-ladder/work/cache.npz \\
      --init work/ember-ladder/students/tiny4-ctx.pt --student tiny4-ctx \\
      --teacher runtime/assets/models/ember-teacher.onnx \\
      --content runtime/assets/photos/heldout \\
      --steps 300 --style ember -o runs/ablation

(the cache is the one `limner compress` made for the ladder: rebuilt by rerunning it)
"""
from __future__ import annotations

import argparse
import csv
import dataclasses
import tempfile
from pathlib import Path

import numpy as np

from limner.bench.color import scielab_delta_e
from limner.bench.metrics import ms_ssim
from limner.bench.style_features import open_for_style, score_set
from limner.runtime.images import cover_crop, list_images, read_image
from limner.compress.distill import distill
from limner.compress.export import stylise
from limner.compress.lossnet import build_loss_net
from limner.compress.warm_start import init_from
from limner.compress.recipe import Recipe
from limner.compress.registry import build
from limner.runtime import config as cfgmod
from limner.runtime.model import load_model

TERMS = ("pixel_l1", "ms_ssim", "feature", "gram", "color_stats", "noise_consistency")
PPD = 19.2  # configs/bench/default.toml: 1.2 m wide screen at 2 m, 640 px wide


def _weights(variant: str, base):
    """The loss weights of one variant (see the module docstring)."""
    kind, _, rest = variant.partition(":")
    if kind == "with":
        known = {f.name for f in dataclasses.fields(base)}
        changes = {}
        for item in rest.split(","):
            name, _, value = item.partition("=")
            if name not in known:
                raise SystemExit(f"variant {variant!r}: {name!r} is not a loss setting ({', '.join(sorted(known))})")
            try:
                changes[name] = float(value)
            except ValueError:
                raise SystemExit(f"variant {variant!r}: {name}={value!r} is not a number") from None
        return dataclasses.replace(base, **changes)
    if variant != "all" and (kind not in ("no", "only") or rest not in TERMS):
        raise SystemExit(f"variant {variant!r}: 'all', 'no:TERM', 'only:TERM' with TERM in {', '.join(TERMS)}, "
                         "or 'with:NAME=W,...'")
    on = set(TERMS) if variant == "all" else (set(TERMS) - {rest} if kind == "no" else {rest})
    return dataclasses.replace(base, **{t: (getattr(base, t) or 1.0) if t in on else 0.0 for t in TERMS})


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--recipe", type=Path, required=True)
    ap.add_argument("--cache", type=Path, required=True, help="OUT/work/cache.npz of a compress run")
    ap.add_argument("--init", required=True, help="student checkpoint every variant starts from")
    ap.add_argument("--student", required=True, help="a student name in the recipe (its knobs)")
    ap.add_argument("--teacher", required=True)
    ap.add_argument("--content", nargs="+", required=True, help="held-out photos or folders of them")
    ap.add_argument("--steps", type=int, default=300)
    ap.add_argument("--lr", type=float, default=None, help="peak learning rate (default: the student's in the recipe)")
    ap.add_argument("--variants", nargs="+", default=["start", "all"] + [f"no:{t}" for t in TERMS],
                    help="'start' (the --init student, untrained further), 'all', 'no:TERM' (all but "
                         "TERM), 'only:TERM' (TERM alone) or 'with:NAME=W,...' (the recipe's [loss] "
                         "with those weights set)")
    ap.add_argument("--style", default="", help="a bundled style name or style image: also score "
                    "each variant's style share against it (as `limner bench` does)")
    ap.add_argument("-o", "--out", type=Path, required=True)
    a = ap.parse_args()

    recipe = cfgmod.load(Recipe, a.recipe)
    for variant in a.variants:  # a misspelt variant fails now, not after the others have trained
        if variant != "start":
            _weights(variant, recipe.loss)
    spec = next((s for s in recipe.student if s.name == a.student), None)
    if spec is None:
        raise SystemExit(f"--student {a.student}: not in {a.recipe}")
    z = np.load(a.cache)
    cache = {k: z[k] for k in z.files}
    lossnet, _ = build_loss_net(recipe.loss_net, None, recipe.loss_seed)
    teacher = load_model(a.teacher)
    photos = {p.stem: cover_crop(read_image(p), 640, 360) for p in list_images(a.content)}
    targets = {k: teacher.run(v) for k, v in photos.items()}
    scorer = None
    if a.style:
        scorer, why = open_for_style(a.style)
        if scorer is None:
            raise SystemExit(f"--style {a.style}: {why}")
        photo_feats = [scorer.features(v) for v in photos.values()]
    def style_share(outs: dict[str, np.ndarray]) -> float:  # the bench's own mean (bench/run.py)
        score = score_set(scorer, [outs[k] for k in photos], list(photos.values()), photo_feats)
        return round(score["style_share"]["mean"], 4)
    a.out.mkdir(parents=True, exist_ok=True)
    rows = []
    teacher_share = style_share(targets) if scorer else None
    lr = spec.lr if a.lr is None else a.lr
    for variant in a.variants:
        net = init_from(a.init, build("student", **spec.knobs), spec.name)
        steps, seconds = 0, 0.0
        if variant != "start":
            r = dataclasses.replace(recipe, loss=_weights(variant, recipe.loss))
            with tempfile.TemporaryDirectory() as work:
                net, info = distill(net, cache, r, a.steps, lr, lossnet, Path(work), f"{variant:>20}", {})
            steps, seconds = a.steps, info["seconds"]
        net.eval()
        row = {"variant": variant, "steps": steps, "lr": lr, "seconds": round(seconds, 1)}
        outs = {name: stylise(net, img) for name, img in photos.items()}
        for name, out in outs.items():
            row[f"ms_ssim_{name}"] = round(ms_ssim(out, targets[name]), 4)
            row[f"delta_e_{name}"] = round(scielab_delta_e(out, targets[name], PPD), 3)
        row["ms_ssim_mean"] = round(float(np.mean([row[f"ms_ssim_{n}"] for n in photos])), 4)
        row["delta_e_mean"] = round(float(np.mean([row[f"delta_e_{n}"] for n in photos])), 3)
        if scorer:
            row["style_share"], row["teacher_style_share"] = style_share(outs), teacher_share
        rows.append(row)
        print(row, flush=True)
        with (a.out / "ablation.csv").open("w", newline="") as f:
            w = csv.DictWriter(f, fieldnames=list(rows[0]))
            w.writeheader()
            w.writerows(rows)
    share = f" style share (teacher {teacher_share:.3f}) |" if scorer else ""
    print(f"\n| variant | MS-SSIM mean | S-CIELAB dE00 mean |{share}\n|---|---|---|{'---|' if scorer else ''}")
    for row in rows:
        cell = f" {row['style_share']:.3f} |" if scorer else ""
        print(f"| {row['variant']} | {row['ms_ssim_mean']:.3f} | {row['delta_e_mean']:.2f} |{cell}")


if __name__ == "__main__":
    main()
