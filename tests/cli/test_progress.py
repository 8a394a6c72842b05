"""Progress receivers of the command line: plain lines for logs, a rich bar on a terminal."""

from __future__ import annotations

import io
import threading

import pytest
from rich.console import Console

from covextract.cli.progress import (
    BarProgress,
    LineProgress,
    as_factory,
    blocks_text,
    make_progress,
    rich_progress,
)
from covextract.core.progress import Progress


class Clock:
    """A clock the test moves by hand."""

    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


class FlushCounting(io.StringIO):
    def __init__(self) -> None:
        super().__init__()
        self.flushes = 0

    def flush(self) -> None:
        self.flushes += 1
        super().flush()


class Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def hammer(progress, threads: int, per_thread: int) -> None:
    """Call ``advance(1)`` from several threads at once, all released together."""
    gate = threading.Barrier(threads)

    def work() -> None:
        gate.wait()
        for _ in range(per_thread):
            progress.advance(1)

    pool = [threading.Thread(target=work) for _ in range(threads)]
    for t in pool:
        t.start()
    for t in pool:
        t.join()


@pytest.mark.parametrize("n, text", [(0, "0 blocks"), (1, "1 block"), (2, "2 blocks")])
def test_blocks_text_plural(n, text):
    assert blocks_text(n) == text


def test_line_progress_prints_one_line_per_pass_and_each_note():
    out, clock = FlushCounting(), Clock()
    p = LineProgress(out, clock=clock)
    p.note("compiling the engine's kernels once for this installation")
    p.start("rain_sum_3m (layer rain)", 40)
    for _ in range(36):
        p.advance()
    clock.now += 2.14
    assert out.getvalue().count("\n") == 1  # nothing printed while the pass runs
    p.finish()
    p.start("ndvi_mean (layer ndvi)", 1)
    p.advance(1)
    clock.now += 0.04
    p.finish()
    p.start("lights_sum (layer lights)", 0)
    p.finish()
    assert out.getvalue() == (
        "compiling the engine's kernels once for this installation\n"
        "rain_sum_3m (layer rain): 36 blocks in 2.1 s\n"
        "ndvi_mean (layer ndvi): 1 block in 0.0 s\n"
        "lights_sum (layer lights): 0 blocks in 0.0 s\n"
    )
    # every line is flushed as it is written, so a log shows how far a run got
    assert out.flushes == 4
    assert "\x1b" not in out.getvalue()


def test_line_progress_finish_without_start_prints_nothing():
    out = io.StringIO()
    p = LineProgress(out)
    p.finish()
    p.start("a (layer b)", 3)
    p.finish()
    p.finish()  # a second finish of the same pass adds nothing
    assert out.getvalue().splitlines() == ["a (layer b): 0 blocks in 0.0 s"]


def test_line_progress_counts_exactly_from_many_threads():
    out = io.StringIO()
    p = LineProgress(out, clock=Clock())
    p.start("ndvi_mean (layer ndvi)", 8000)
    hammer(p, threads=8, per_thread=1000)
    p.finish()
    assert out.getvalue() == "ndvi_mean (layer ndvi): 8000 blocks in 0.0 s\n"


def test_bar_progress_closes_at_the_real_count():
    buf = io.StringIO()
    console = Console(force_terminal=True, file=buf, width=100, color_system=None)
    p = BarProgress(console, clock=Clock())
    p.note("a note [not markup]")
    p.start("rain_sum_3m (layer rain)", 40)
    hammer(p, threads=6, per_thread=6)
    assert p._done == 36
    p.finish()
    text = buf.getvalue()
    assert "a note [not markup]" in text
    assert "rain_sum_3m (layer rain)" in text
    # the expected 40 was an upper bound: the last frame shows the 36 blocks read
    last = text.rstrip().rsplit("\r", 1)[-1]
    assert "36/36 blocks" in last
    assert "/40" not in last
    # a second pass draws its own bar; one that reads nothing ends at 0/0
    p.start("lights_sum (layer lights)", 0)
    p.finish()
    assert "0/0 blocks" in buf.getvalue().rstrip().rsplit("\r", 1)[-1]


def test_bar_progress_grows_the_total_when_more_blocks_come():
    buf = io.StringIO()
    p = BarProgress(Console(force_terminal=True, file=buf, width=100, color_system=None))
    p.start("x (layer y)", 2)
    p.advance(5)
    p.finish()
    assert "5/5 blocks" in buf.getvalue().rstrip().rsplit("\r", 1)[-1]


def test_make_progress_chooses_by_stream():
    assert type(make_progress(quiet=True)) is Progress
    assert type(make_progress(quiet=True, stream=Terminal())) is Progress
    assert isinstance(make_progress(quiet=False, stream=io.StringIO()), LineProgress)
    bar = make_progress(quiet=False, stream=Terminal())
    assert isinstance(bar, BarProgress)
    assert bar.console.file is not None and bar.console.is_terminal


def test_quiet_progress_prints_nothing(capsys):
    p = make_progress(quiet=True)
    p.note("x")
    p.start("a (layer b)", 3)
    p.advance(3)
    p.finish()
    assert capsys.readouterr() == ("", "")


def test_as_factory_drives_a_progress_like_the_old_callback():
    out, clock = io.StringIO(), Clock()
    factory = as_factory(LineProgress(out, clock=clock))
    advance = factory("ndvi_mean (layer ndvi)", 18)
    advance(3)
    advance(15)
    clock.now += 0.8
    advance(0, done=True)
    assert out.getvalue() == "ndvi_mean (layer ndvi): 18 blocks in 0.8 s\n"


def test_rich_progress_without_a_terminal_prints_plain_lines(capsys):
    advance = rich_progress()("veg (layer veg)", 8)
    advance(2)
    advance(0, done=True)
    err = capsys.readouterr().err
    assert err.startswith("veg (layer veg): 2 blocks in ")
    assert err.endswith(" s\n") and "\x1b" not in err
