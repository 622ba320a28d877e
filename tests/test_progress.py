"""Progress callables: silent off a terminal or when quiet, a bar with rate and time left on one."""

from __future__ import annotations

import io

import pytest

from labelprep import progress


class _Tty(io.StringIO):
    """A stream that says it is a terminal."""

    def isatty(self):
        return True


class _Clock:
    """A fake monotonic clock advancing a fixed step at every reading."""

    def __init__(self, step):
        self.now, self.step = 0.0, step

    def __call__(self):
        self.now += self.step
        return self.now


class TestTerminal:
    @pytest.mark.parametrize("stream, quiet", [(io.StringIO(), False), (_Tty(), True)])
    def test_silent_off_a_terminal_or_when_quiet(self, stream, quiet):
        """A pipe or log file, or --quiet, gets no output and the items pass through unchanged."""
        bar = progress.terminal(quiet=quiet, stream=stream)
        assert bar is progress.silent
        assert list(bar(iter("abc"), total=3, label="scan")) == ["a", "b", "c"]
        assert stream.getvalue() == ""

    def test_bar_on_a_terminal_shows_count_rate_and_eta(self, monkeypatch):
        """On a terminal the bar redraws in place and ends with the final state on its own line."""
        monkeypatch.setattr(progress.time, "monotonic", _Clock(0.5))
        stream = _Tty()
        bar = progress.terminal(stream=stream)
        assert list(bar(range(4), total=4, label="scan")) == [0, 1, 2, 3]
        text = stream.getvalue()
        assert text.startswith("\r") and text.endswith("\n")
        final = text.rstrip("\n").split("\r")[-1]
        # the clock is read at the start and after each item: 4 items in 2 s
        assert "4/4" in final and "2.0/s" in final and "ETA 0:00:00" in final

    def test_interrupted_loop_leaves_its_last_state(self):
        """When the consumer stops early the line still ends, so later output starts clean."""
        stream = _Tty()
        items = progress.terminal(stream=stream)(range(10), total=10, label="scan")
        next(items)
        items.close()
        assert stream.getvalue().endswith("\n") and "1/10" in stream.getvalue()

    def test_empty_loop_draws_nothing(self):
        stream = _Tty()
        assert list(progress.terminal(stream=stream)([], total=0, label="scan")) == []
        assert stream.getvalue() == ""


class TestLine:
    @pytest.mark.parametrize("done, total, elapsed, rate, eta", [
        (50, 200, 10.0, "5.0/s", "ETA 0:00:30"),      # 150 left at 5/s
        (1, 7201, 1.0, "1.0/s", "ETA 2:00:00"),       # 7200 left at 1/s
        (200, 200, 4.0, "50.0/s", "ETA 0:00:00"),
    ])
    def test_rate_and_time_left(self, done, total, elapsed, rate, eta):
        """Time left = items left / average rate so far (the usual linear estimate, common practice)."""
        text = progress.line("scan", done, total, elapsed)
        assert rate in text and eta in text and f"{done}/{total}" in text

    def test_bar_fill_is_proportional(self):
        text = progress.line("scan", 1, 2, 1.0)
        assert "[" + "#" * 12 + "." * 12 + "]" in text

    def test_no_rate_yet(self):
        """Before any time has passed there is no rate, and no estimate is invented."""
        assert "ETA -:--:--" in progress.line("scan", 0, 10, 0.0)

    def test_unknown_total_shows_count_and_rate(self):
        assert progress.line("walk", 30, None, 3.0).split() == ["walk", "30", "10.0/s"]


def test_resolve():
    assert progress.resolve(None) is progress.silent
    assert progress.resolve(print) is print
