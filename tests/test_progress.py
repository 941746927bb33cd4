"""Progress lines: whole lines into files and pipes, one erased-and-redrawn line on a terminal."""
from __future__ import annotations

import io

from limner.runtime.progress import Progress


class _Tty(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_pipe_gets_whole_lines_without_carriage_returns():
    s = io.StringIO()
    p = Progress(3, "job", stream=s, min_interval_s=0.0)
    for k in range(3):
        p.update(1, "done" if k == 0 else "d")
    p.close()
    text = s.getvalue()
    assert "\r" not in text and "\x1b" not in text
    assert text.count("\n") == 3 and text.splitlines()[-1].startswith("job [") and "3/3" in text


def test_terminal_redraw_erases_the_rest_of_a_longer_previous_line():
    """'doneddoned' on a terminal: a shorter text over a longer one must not leave its tail.
    ANSI/ECMA-48 EL (ESC [ K, erase to end of line) clears it."""
    s = _Tty()
    p = Progress(2, "x.onnx:", stream=s, min_interval_s=0.0)
    p.update(1, "distilling a long way")
    p.update(1, "done")
    p.close()
    redraws = s.getvalue().split("\r")[1:]
    assert len(redraws) == 2 and all(r.rstrip("\n").endswith("\x1b[K") for r in redraws)
