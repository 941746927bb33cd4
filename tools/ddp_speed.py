"""Does torchrun pay on this machine? Times `limner train` as one process with T threads
against P processes of T/P threads each (torchrun, gloo), same global batch and steps.

    python tools/ddp_speed.py [--steps 40] [--procs 2] [--threads 2] [--size 128] [--batch 4]

Reads the seconds column of each run's losses.csv and compares the steady part (after the
first quarter of the steps: start-up, caches and the loss normalisation are excluded).
Run it on a quiet machine: both runs share the host one after the other, so a load that
comes and goes in between skews the ratio.
"""
from __future__ import annotations

import argparse
import csv
import os
import subprocess
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def steady_seconds(losses: Path, skip: int) -> tuple[float, int]:
    rows = list(csv.DictReader(open(losses)))
    t = [float(r["seconds"]) for r in rows]
    return t[-1] - t[skip - 1], len(t) - skip


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--steps", type=int, default=40)
    ap.add_argument("--procs", type=int, default=2)
    ap.add_argument("--threads", type=int, default=2, help="threads in all, both ways")
    ap.add_argument("--size", type=int, default=128)
    ap.add_argument("--batch", type=int, default=4)
    ap.add_argument("--style", default="ember")
    a = ap.parse_args(argv)
    if a.threads % a.procs or a.batch % a.procs:
        ap.error(f"--threads {a.threads} and --batch {a.batch} must divide by --procs {a.procs}")
    common = [a.style, "--content", str(REPO / "runtime" / "assets" / "photos" / "train"),
              "--config", str(REPO / "configs" / "train" / "ember-hed.toml"),
              "--steps", str(a.steps), "--size", str(a.size), "--batch", str(a.batch)]
    skip = max(1, a.steps // 4)
    with tempfile.TemporaryDirectory() as tmp:
        one, many = Path(tmp) / "one", Path(tmp) / "many"
        subprocess.run([sys.executable, "-m", "limner.runtime.cli", "train", *common,
                        "--threads", str(a.threads), "-o", str(one)], check=True,
                       stdout=subprocess.DEVNULL)
        env = dict(os.environ, OMP_NUM_THREADS=str(a.threads // a.procs))
        subprocess.run([sys.executable, "-m", "torch.distributed.run", "--standalone",
                        "--nproc_per_node", str(a.procs), "-m", "limner.runtime.cli", "train", *common,
                        "--threads", str(a.threads // a.procs), "-o", str(many)], check=True, env=env,
                       stdout=subprocess.DEVNULL)
        s1, n = steady_seconds(one / "losses.csv", skip)
        sp, _ = steady_seconds(many / "losses.csv", skip)
    print(f"steps {skip + 1}-{a.steps} at {a.size} px, batch {a.batch}: 1 process x {a.threads} threads "
          f"{s1:.1f} s ({n / s1:.2f} steps/s); {a.procs} processes x {a.threads // a.procs} threads "
          f"{sp:.1f} s ({n / sp:.2f} steps/s); speed-up {s1 / sp:.2f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())
