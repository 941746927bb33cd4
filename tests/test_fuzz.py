"""Seeded random inputs for the parsers and the live pipeline, for a bounded time.

Parsers: resolutions, show files, compression recipes, bench and train configs, built by
mutating the bundled files (keys dropped, values of the wrong type, out-of-range numbers,
unknown keys, broken TOML). Each must load or raise InputError naming the problem (the
user's mistake), never another exception (Limner's defect).

Live pipeline: a camera whose frames change size (odd, prime and tiny sizes), channel count
and rate, which fails, raises from its driver, hangs, and disappears and returns. The show
must keep producing outputs of the planned size and end when asked.

The fast default runs a few seeds; `-m slow` runs many more within a time budget. A failing
seed is printed so that it can be replayed.
"""
from __future__ import annotations

import random
import time
import tomllib
from pathlib import Path

import numpy as np
import pytest

from conftest import REPO
from limner.runtime.errors import InputError

CONFIGS = {
    "show": REPO / "configs" / "shows" / "gallery.toml",
    "recipe": REPO / "configs" / "compress" / "default.toml",
    "train": REPO / "configs" / "train" / "ember-hed.toml",
}
ODD_VALUES = [-1, 0, 1, 3, 10 ** 9, 1e-9, -0.5, float("nan"), "", "x", "640x360", "abc\u00e9", True, False,
              [], [1, "a"], {"k": 1}]


def _loader(kind: str):
    from limner.runtime import config as cfgmod
    if kind == "show":
        from limner.runtime.settings import load_show
        return load_show
    if kind == "recipe":
        from limner.compress.recipe import Recipe
        return lambda p: cfgmod.load(Recipe, p)
    from limner.compress.train import TrainConfig
    return lambda p: cfgmod.load(TrainConfig, p)


def _toml(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float) and v != v:
        return "nan"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, list):
        return "[" + ", ".join(_toml(x) for x in v) + "]"
    return "{" + ", ".join(f"{k} = {_toml(x)}" for k, x in v.items()) + "}"


def _dump(d: dict, prefix: str = "") -> str:
    """A small TOML writer for the mutated tables (tomllib reads only)."""
    lines, tables = [], []
    for k, v in d.items():
        if isinstance(v, dict):
            tables.append((k, v))
        elif isinstance(v, list) and v and all(isinstance(x, dict) for x in v):
            tables += [(f"[{k}]", x) for x in v]
        else:
            lines.append(f"{k} = {_toml(v)}")
    out = "\n".join(lines) + "\n"
    for k, v in tables:
        name = f"{prefix}{k}" if not k.startswith("[") else f"[{prefix}{k[1:-1]}]"
        out += f"\n[{name}]\n" + _dump(v, f"{name.strip('[]')}.")
    return out


def _mutate(d: dict, rng: random.Random) -> dict:
    d = tomllib.loads(_dump(d)) if d else {}
    paths = []

    def walk(t, trail):
        for k, v in t.items():
            paths.append((t, k))
            if isinstance(v, dict):
                walk(v, trail + [k])
            elif isinstance(v, list):
                for x in v:
                    if isinstance(x, dict):
                        walk(x, trail + [k])
    walk(d, [])
    for _ in range(rng.randint(1, 3)):
        if not paths:
            break
        t, k = rng.choice(paths)
        if k not in t:
            continue
        op = rng.random()
        if op < 0.2:
            del t[k]
        elif op < 0.3:
            t[f"unknown_{rng.randint(0, 99)}"] = 1
        else:
            t[k] = rng.choice(ODD_VALUES)
    return d


def _check_config(kind: str, seed: int, tmp_path: Path) -> None:
    rng = random.Random(f"{kind}-{seed}")
    base = tomllib.loads(CONFIGS[kind].read_text())
    text = _dump(_mutate(base, rng))
    if rng.random() < 0.1:  # broken TOML
        text = text[: rng.randint(0, len(text))] + rng.choice(["[[", "= =", "\x00", '"'])
    p = tmp_path / f"{kind}-{seed}.toml"
    p.write_text(text)
    try:
        _loader(kind)(p)
    except InputError as e:
        assert str(e).strip(), f"seed {seed}: an empty message"
    except Exception as e:  # noqa: BLE001 (any other type is the defect this test looks for)
        pytest.fail(f"{kind} seed {seed}: {type(e).__name__}: {e}\n--- {p.name} ---\n{text}")


def _check_resolution(seed: int) -> None:
    from limner.runtime.images import parse_resolution
    rng = random.Random(seed)
    alphabet = "0123456789xX -+.e\u00d7,"
    text = "".join(rng.choice(alphabet) for _ in range(rng.randint(0, 12)))
    try:
        w, h = parse_resolution(text)
    except InputError:
        return
    assert w > 0 and h > 0, f"{text!r} parsed as {w}x{h}"


class FuzzCamera:
    """Frames of changing size, channel count and rate; read failures, driver exceptions,
    hangs, and a device that is gone for a while (its open fails)."""
    is_live = True
    description = "fuzz camera"
    rng = random.Random(0)
    opens = 0

    def __init__(self) -> None:
        FuzzCamera.opens += 1
        r = FuzzCamera.rng
        if FuzzCamera.opens > 1 and r.random() < 0.3:
            raise OSError("the device disappeared")   # unplugged: open fails, the supervisor retries
        self.left = r.randint(3, 40)                   # frames before this opening ends

    def read(self):
        r = FuzzCamera.rng
        time.sleep(r.choice([0.0, 0.001, 0.01, 0.03]))
        self.left -= 1
        if self.left < 0:
            kind = r.random()
            if kind < 0.3:
                raise RuntimeError("driver error")    # a driver that died with the device
            if kind < 0.4:
                time.sleep(0.8)                        # a hang longer than stall_s
            return False, None
        h = r.choice([1, 2, 3, 17, 31, 97, 120, 181, 240, 361])
        w = r.choice([1, 3, 16, 33, 101, 160, 211, 320, 641])
        shape = r.choice([(h, w, 3), (h, w, 3), (h, w), (h, w, 4), (h, w, 1)])
        return True, np.full(shape, r.randint(0, 255), np.uint8)

    def release(self) -> None:
        pass


def _check_live(seed: int, model: Path) -> None:
    from limner.runtime.live_loop import Live
    from limner.runtime.settings import PlayItem, ShowConfig

    FuzzCamera.rng = random.Random(seed)
    FuzzCamera.opens = 0
    show = ShowConfig(play=[PlayItem(model=str(model), seconds=1e9)])
    show.inference.ladder = [random.Random(seed).choice(["160x96", "96x64", "161x97"])]
    show.capture.stall_s = 0.5
    show.display.window = False
    live = Live(show, FuzzCamera, max_frames=25)
    live.capture.backoff_s = (0.01, 0.05)
    t0 = time.monotonic()
    stats = live.run()
    assert stats.frames >= 25, f"seed {seed}: the show stopped after {stats.frames} outputs"
    assert time.monotonic() - t0 < 120, f"seed {seed}: took {time.monotonic() - t0:.0f} s"
    sizes = set(stats.sizes)
    assert len(sizes) == 1, f"seed {seed}: output sizes {sizes}"


@pytest.mark.parametrize("kind", sorted(CONFIGS))
def test_mutated_configs_load_or_name_the_problem(kind, tmp_path):
    for seed in range(25):
        _check_config(kind, seed, tmp_path)


def test_random_resolution_strings():
    for seed in range(300):
        _check_resolution(seed)


@pytest.mark.parametrize("seed", range(3))
def test_live_survives_a_misbehaving_camera(seed, teacher_onnx):
    _check_live(seed, teacher_onnx)


@pytest.mark.slow
def test_fuzz_for_a_time_budget(teacher_onnx, tmp_path):
    """About two minutes: configs, resolutions and live runs with fresh seeds."""
    end = time.monotonic() + 120
    seed = 1000
    while time.monotonic() < end:
        for kind in sorted(CONFIGS):
            _check_config(kind, seed, tmp_path)
        _check_resolution(seed)
        if seed % 5 == 0:
            _check_live(seed, teacher_onnx)
        seed += 1
