"""Progress reporting without global state: library functions take a ``progress`` callable.

``progress(iterable, total=N, label="...")`` returns an iterable yielding the same items. The
library calls it around long loops; the command line passes a terminal bar, tests pass nothing.
"""

from __future__ import annotations

import sys
import time

# redraw at most this often: a faster bar costs more than it tells
_REDRAW_SECONDS = 0.2
_BAR_WIDTH = 24


def silent(iterable, *, total=None, label=""):
    """The default: no output."""
    return iterable


def resolve(progress):
    """``progress`` itself, or :func:`silent` when it is None."""
    return silent if progress is None else progress


def terminal(*, quiet: bool = False, stream=None):
    """A progress callable drawing a bar with items per second and time left on ``stream``.

    Silent when ``quiet`` or when the stream is not a terminal (logs and pipes stay clean).

    Parameters
    ----------
    quiet : bool
        Draw nothing.
    stream : file-like, optional
        Where to draw (default: standard error).

    Returns
    -------
    callable
        ``progress(iterable, total=None, label="")`` yielding the items of ``iterable``.

    Examples
    --------
    >>> import io
    >>> bar = terminal(stream=io.StringIO())   # not a terminal: silent
    >>> list(bar(range(3), total=3, label="scan"))
    [0, 1, 2]
    """
    stream = sys.stderr if stream is None else stream
    if quiet or not getattr(stream, "isatty", lambda: False)():
        return silent

    def bar(iterable, *, total=None, label=""):
        return _bar(iterable, total, label, stream)

    return bar


def _bar(iterable, total, label, stream):
    start = last = now = time.monotonic()
    done = 0
    try:
        for item in iterable:
            done += 1  # counted when handed out, so an interrupted loop reports what it received
            yield item
            now = time.monotonic()
            if now - last >= _REDRAW_SECONDS:
                last = now
                stream.write("\r" + line(label, done, total, now - start))
                stream.flush()
    finally:
        # also when the loop is interrupted: leave the last state on its own line
        if done:
            stream.write("\r" + line(label, done, total, now - start) + "\n")
            stream.flush()


def line(label: str, done: int, total, elapsed: float) -> str:
    """One state of the bar: items done, the rate per second, and the estimated time left.

    The estimate assumes the rest goes at the average rate so far.

    Examples
    --------
    >>> line("scan", 50, 200, 10.0)
    'scan       [######..................] 50/200     5.0/s  ETA 0:00:30 '
    >>> line("walk", 50, None, 10.0)
    'walk       50     5.0/s '
    """
    rate = done / elapsed if elapsed > 0 else 0.0
    if total:
        filled = min(_BAR_WIDTH, int(_BAR_WIDTH * done / total))
        eta = _clock((total - done) / rate) if rate > 0 else "-:--:--"
        return (f"{label:<10} [{'#' * filled}{'.' * (_BAR_WIDTH - filled)}] {done}/{total} "
                f"{rate:7.1f}/s  ETA {eta} ")
    return f"{label:<10} {done} {rate:7.1f}/s "


def _clock(seconds: float) -> str:
    seconds = int(round(seconds))
    return f"{seconds // 3600:d}:{seconds // 60 % 60:02d}:{seconds % 60:02d}"
