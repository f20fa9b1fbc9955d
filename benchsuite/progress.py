"""Progress of a long run: a tqdm bar on a terminal, plain lines elsewhere, both with rate and time left.

:func:`progress_display` returns ``show(done, text)``, the same callable
shape as the runner's hand-written printer, so the runner can swap it in:
``show = progress_display(total, progress)``. ``done`` counts finished units
(monitored passes and timing replays) out of ``total``; ``text`` says what
just finished.

* ``mode=False``: silent.
* stderr is a terminal (``mode`` None or True): a tqdm bar -- count, rate and
  estimated time left, the last finished case beside it; closed at ``total``.
* otherwise (CI logs, pipes): one plain line per update,
  ``benchsuite: [12/143] 4.1/s, about 0:32 left  <text>`` -- the rate is
  finished units per second since the display was made, the time left is
  what is left at that rate (an estimate: units differ in cost).

tqdm is imported only when a bar is drawn.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable
from typing import IO

__all__ = ["format_eta", "plain_line", "progress_display"]


def format_eta(seconds: float) -> str:
    """``h:mm:ss`` or ``m:ss``; ``?`` when unknown."""
    if not seconds >= 0 or seconds == float("inf"):
        return "?"
    s = int(round(seconds))
    h, rest = divmod(s, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def plain_line(done: int, total: int, elapsed: float, text: str) -> str:
    """The line printed when stderr is not a terminal (a pure function of its arguments)."""
    if done > 0 and elapsed > 0:
        rate = done / elapsed
        left = (total - done) / rate
        speed = f"{rate:.3g}/s, about {format_eta(left)} left" if done < total else f"{rate:.3g}/s, done in {format_eta(elapsed)}"
    else:
        speed = "rate not known yet"
    return f"benchsuite: [{done}/{total}] {speed}  {text}"


def progress_display(
    total: int,
    mode: bool | None = None,
    *,
    stream: IO[str] | None = None,
    clock: Callable[[], float] = time.monotonic,
) -> Callable[[int, str], None]:
    """``show(done, text)`` for ``total`` units (see the module docstring)."""
    if mode is False:
        return lambda done, text: None
    out = stream if stream is not None else sys.stderr
    tty = bool(getattr(out, "isatty", lambda: False)())
    if not tty:
        start = clock()

        def line(done: int, text: str) -> None:
            print(plain_line(done, total, clock() - start, text), file=out, flush=True)

        return line
    from tqdm import tqdm

    bar = tqdm(total=total, file=out, unit="pass", dynamic_ncols=True, leave=True, smoothing=0.1,
               bar_format="{l_bar}{bar}| {n_fmt}/{total_fmt} [{elapsed}<{remaining}, {rate_fmt}] {postfix}")

    def show(done: int, text: str) -> None:
        if bar.disable:
            return
        bar.set_postfix_str(text[:60], refresh=False)
        bar.update(max(0, done - bar.n))
        if done >= total:
            bar.close()

    return show
