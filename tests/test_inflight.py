"""Frames stylised side by side come out in capture order (the ordering rule is the
project's own: a picture must never step backwards; common practice, no source)."""
from __future__ import annotations

import threading
import time
from pathlib import Path

import numpy as np

from limner.runtime.inflight import InFlight, Output
from limner.runtime.live_loop import Live
from limner.runtime.settings import PlayItem, ShowConfig


def _out(seq: int) -> Output:
    return Output(seq, np.zeros((2, 2, 3), np.uint8), 0.0, 0.0, (2, 2))


def test_results_finishing_out_of_order_are_taken_in_capture_order():
    q = InFlight()
    for s in (3, 4, 5):
        q.claim(s)
    q.finish(_out(5))
    q.finish(_out(4))
    assert q.next(timeout=0.01) is None      # 3 is still being stylised
    q.finish(_out(3))
    assert [q.next(timeout=0.01).seq for _ in range(3)] == [3, 4, 5]
    assert q.next(timeout=0.01) is None


def test_a_failed_frame_does_not_block_the_ones_after_it():
    q = InFlight()
    q.claim(1)
    q.claim(2)
    q.finish(_out(2))
    q.give_up(1)
    assert q.next(timeout=0.01).seq == 2 and q.dropped == 1


def test_a_holding_card_waits_for_pending_frames():
    q = InFlight()
    q.claim(7)
    q.post(_out(-1))
    assert q.next(timeout=0.01) is None
    q.finish(_out(7))
    assert q.next(timeout=0.01).seq == 7
    assert q.next(timeout=0.01).seq == -1


class Numbered:
    """A clip of frames whose grey level is their index: lossless (not live, no pacing)."""
    is_live = False
    loop = False
    description = "numbered clip"

    def __init__(self, n: int = 24) -> None:
        self.i, self.n = 0, n

    def read(self):
        if self.i >= self.n:
            return False, None
        self.i += 1
        return True, np.full((96, 160, 3), self.i * 8, np.uint8)

    def release(self):
        pass


def test_two_workers_keep_every_frame_of_a_file_in_order(teacher_onnx: Path):
    show = ShowConfig(play=[PlayItem(model=str(teacher_onnx), seconds=1e9)])
    show.inference.ladder = ["160x96"]
    show.inference.threads = 2
    show.inference.workers = 2
    show.display.window = False
    show.safety.flash_limit = False
    live = Live(show, Numbered)
    seen: list[int] = []
    stylise = live._stylise
    lock = threading.Lock()

    def slow_when_odd(x: np.ndarray) -> np.ndarray:
        level = int(x[0, 0, 0]) // 8
        time.sleep(0.05 if level % 2 else 0.0)   # odd frames finish after the next even one
        with lock:
            seen.append(level)
        return np.full_like(x, level)            # the output names its frame
    live._stylise = slow_when_odd
    shown: list[int] = []
    limiter = live.limiter

    def record(image: np.ndarray, now: float) -> np.ndarray:
        shown.append(int(image[0, 0, 0]))
        return limiter(image, now)
    live.limiter = record
    stats = live.run()
    assert stylise is not None and stats.workers == 2
    assert shown == list(range(1, 25))            # every frame, in capture order
    assert seen != sorted(seen)                   # ...although they finished out of order
