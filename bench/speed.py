"""Speed of one model, measured in its own subprocess (so peak RSS is that model's).

The worker loads the model with the live runtime's session settings and feeds it
uint8 BGR frames end to end through the model contract.
"""
from __future__ import annotations

import json
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np


def peak_rss_mb() -> float:
    """This process's own peak resident set size in MB.

    Linux: VmHWM from /proc/self/status, the high-water mark of this process's memory map.
    Not ru_maxrss: Linux keeps it across fork and exec, so a subprocess reports at least
    its parent's peak (measured here: a child of a 600 MB parent reported ru_maxrss 613 MB
    and VmHWM 13.6 MB), and the bench parent grows as it runs."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return rss / (1024.0 * 1024.0) if sys.platform == "darwin" else rss / 1024.0  # bytes on macOS


def _percentile(v: list[float], q: float) -> float:
    return float(np.percentile(np.array(v), q))


def measure(model_path: str, images: list[str], sizes: list[tuple[int, int]], threads: list[int],
            warmup: int, frames: int) -> dict:
    from limner.runtime.images import cover_crop, read_image
    from limner.runtime.model import load_model
    from limner.runtime.session import default_threads

    src = [read_image(Path(p)) for p in images]
    results = []
    for th in threads:
        n_threads = th or default_threads()
        t0 = time.perf_counter()
        model = load_model(model_path, n_threads)
        load_s = time.perf_counter() - t0
        for w, h in sizes:
            batch = [cover_crop(img, w, h) for img in src]
            tw = time.perf_counter()
            for i in range(warmup):
                model.run(batch[i % len(batch)])
            warm_s = time.perf_counter() - tw
            lat = []
            tt = time.perf_counter()
            for i in range(frames):
                t = time.perf_counter()
                model.run(batch[i % len(batch)])
                lat.append((time.perf_counter() - t) * 1000)
            total = time.perf_counter() - tt
            results.append({"resolution": f"{w}x{h}", "threads": n_threads, "load_s": load_s,
                            "warmup_s": warm_s, "frames": frames,
                            "p50_ms": _percentile(lat, 50), "p95_ms": _percentile(lat, 95),
                            "p99_ms": _percentile(lat, 99), "fps": frames / total})
        del model
    return {"results": results, "peak_rss_mb": peak_rss_mb()}


def measure_in_subprocess(model_path: str, images: list[str], sizes: list[tuple[int, int]],
                          threads: list[int], warmup: int, frames: int, timeout_s: float = 3600) -> dict:
    args = json.dumps({"model_path": model_path, "images": images, "sizes": sizes,
                       "threads": threads, "warmup": warmup, "frames": frames})
    r = subprocess.run([sys.executable, "-m", "limner.bench.speed", args], capture_output=True,
                       text=True, timeout=timeout_s)
    if r.returncode != 0:
        last = (r.stderr.strip().splitlines() or ["no output"])[-1]
        raise RuntimeError(f"{model_path}: speed measurement failed: {last}")
    return json.loads(r.stdout.strip().splitlines()[-1])


if __name__ == "__main__":
    a = json.loads(sys.argv[1])
    a["sizes"] = [tuple(s) for s in a["sizes"]]
    print(json.dumps(measure(**a)))
