"""Frames in flight between the inference workers and the presenter, kept in capture order.

Several workers stylise consecutive frames at once (each onnxruntime call on one or a few
threads: two single-threaded calls side by side do more frames per second on two cores
than one call on two threads). They finish out of order; the presenter takes results in
the order the frames were captured, so the picture never steps backwards and a recorded
file keeps every frame in sequence.
"""
from __future__ import annotations

import heapq
import threading
from dataclasses import dataclass

import numpy as np


@dataclass
class Output:
    seq: int                  # the captured frame's number; -1 for a holding card
    image: np.ndarray
    t_capture: float
    t_done: float
    size: tuple[int, int]
    busy_s: float = 0.0       # the worker's time on this frame


class InFlight:
    def __init__(self) -> None:
        self.cond = threading.Condition()
        self._claimed: list[int] = []          # heap of seqs being worked on or done
        self._done: dict[int, Output] = {}
        self._out_of_band: Output | None = None  # a holding card: shown when nothing is pending
        self.dropped = 0                       # claims given up (a worker error)

    def claim(self, seq: int) -> None:
        with self.cond:
            heapq.heappush(self._claimed, seq)

    def finish(self, out: Output) -> None:
        with self.cond:
            self._done[out.seq] = out
            self.cond.notify_all()

    def give_up(self, seq: int) -> None:
        """A claimed frame that will produce no output (its worker failed)."""
        with self.cond:
            if seq in self._claimed:
                self._claimed.remove(seq)
                heapq.heapify(self._claimed)
                self.dropped += 1
            self.cond.notify_all()

    def post(self, out: Output) -> None:
        """An output that belongs to no captured frame (the holding card)."""
        with self.cond:
            self._out_of_band = out
            self.cond.notify_all()

    def pending(self) -> int:
        with self.cond:
            return len(self._claimed)

    def next(self, timeout: float) -> Output | None:
        """The oldest claimed frame's output once it is done, or a posted card when no
        frame is pending; None after `timeout` seconds without one."""
        with self.cond:
            out = self._take()
            if out is None:
                self.cond.wait(timeout)
                out = self._take()
            return out

    def _take(self) -> Output | None:
        if self._claimed and self._claimed[0] in self._done:
            return self._done.pop(heapq.heappop(self._claimed))
        if not self._claimed and self._out_of_band is not None:
            out, self._out_of_band = self._out_of_band, None
            return out
        return None
