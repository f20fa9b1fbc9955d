"""The progress display: plain lines with rate and time left off a terminal, a tqdm bar on one."""

from __future__ import annotations

import io

from benchsuite.progress import format_eta, plain_line, progress_display


class FakeClock:
    def __init__(self) -> None:
        self.t = 100.0

    def __call__(self) -> float:
        return self.t


class Tty(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_format_eta() -> None:
    assert format_eta(0) == "0:00"
    assert format_eta(75.4) == "1:15"
    assert format_eta(3 * 3600 + 62) == "3:01:02"
    assert format_eta(float("inf")) == "?" and format_eta(float("nan")) == "?"


def test_plain_lines_rate_and_time_left() -> None:
    clock, out = FakeClock(), io.StringIO()
    show = progress_display(10, None, stream=out, clock=clock)
    clock.t += 4.0
    show(2, "quad gd: reached")  # 2 units in 4 s: 0.5/s, 8 left -> 16 s
    clock.t += 16.0
    show(10, "last")
    lines = out.getvalue().splitlines()
    assert lines[0] == "benchsuite: [2/10] 0.5/s, about 0:16 left  quad gd: reached"
    assert lines[1] == "benchsuite: [10/10] 0.5/s, done in 0:20  last"
    assert plain_line(0, 5, 0.0, "x") == "benchsuite: [0/5] rate not known yet  x"


def test_silent() -> None:
    out = io.StringIO()
    progress_display(3, False, stream=out)(1, "x")
    assert out.getvalue() == ""


def test_terminal_bar_counts_to_total_and_closes() -> None:
    out = Tty()
    show = progress_display(4, None, stream=out)
    show(1, "first case")
    show(4, "last case")
    text = out.getvalue()
    assert "4/4" in text and "last case" in text  # tqdm's counter and our postfix
    assert "pass/s" in text or "s/pass" in text  # the rate, in tqdm's units
    assert text.endswith("\n")  # closed: the next output starts on its own line
