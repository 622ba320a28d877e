"""Progress reporting without global state: library functions take a ``progress`` callable.

``progress(iterable, total=N, label="...")`` returns an iterable yielding the same items. The
library calls it around long loops; the command line passes a terminal bar, tests pass nothing.
"""

from __future__ import annotations

import sys
import time


def silent(iterable, *, total=None, label=""):
    """The default: no output."""
    return iterable


def resolve(progress):
    """``progress`` itself, or :func:`silent` when it is None."""
    return silent if progress is None else progress


def terminal(*, quiet: bool = False, stream=None):
    """A progress callable drawing a bar with files per second and time left on ``stream``.

    Silent when ``quiet`` or when the stream is not a terminal (logs and pipes stay clean).
    """
    stream = sys.stderr if stream is None else stream
    if quiet or not getattr(stream, "isatty", lambda: False)():
        return silent

    def bar(iterable, *, total=None, label=""):
        return _bar(iterable, total, label, stream)

    return bar


def _bar(iterable, total, label, stream):
    start = time.monotonic()
    last = 0.0
    done = 0
    for item in iterable:
        yield item
        done += 1
        now = time.monotonic()
        if now - last >= 0.2 or (total is not None and done == total):
            last = now
            stream.write("\r" + _line(label, done, total, now - start))
            stream.flush()
    if done:
        stream.write("\r" + _line(label, done, total, time.monotonic() - start) + "\n")
        stream.flush()


def _line(label, done, total, elapsed) -> str:
    rate = done / elapsed if elapsed > 0 else 0.0
    if total:
        width = 24
        filled = int(width * done / total)
        left = (total - done) / rate if rate > 0 else 0.0
        return (f"{label:<10} [{'#' * filled}{'.' * (width - filled)}] {done}/{total} "
                f"{rate:7.1f}/s  {_clock(left)} left ")
    return f"{label:<10} {done} {rate:7.1f}/s "


def _clock(seconds: float) -> str:
    seconds = int(seconds)
    return f"{seconds // 3600:d}:{seconds // 60 % 60:02d}:{seconds % 60:02d}"
