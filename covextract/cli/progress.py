"""What the command line does with a run's progress events.

The library calls a :class:`covextract.core.progress.Progress`; this module
chooses the receiver: a rich bar per pass on a terminal, one plain line per
pass when stderr is a log, a pipe or a cron mail, and the silent base class
with ``--quiet``. rich is imported only when a bar is drawn.
"""

from __future__ import annotations

import sys
import threading
import time

from covextract.cli.common import counted
from covextract.core.progress import Progress

__all__ = [
    "BarProgress",
    "LineProgress",
    "as_factory",
    "blocks_text",
    "make_progress",
    "rich_progress",
]


def blocks_text(n: int) -> str:
    """``"1 block"``, ``"36 blocks"``."""
    return counted(n, "block")


def make_progress(*, quiet: bool, stream=None) -> Progress:
    """The progress receiver for a command's run.

    Parameters
    ----------
    quiet : bool
        ``True`` gives the silent :class:`Progress` (``--quiet``).
    stream : file, optional
        Where progress goes; standard error by default. A terminal gets a
        rich bar per pass, anything else (a log file, a pipe, cron) one plain
        line per pass.

    Returns
    -------
    Progress
    """
    if quiet:
        return Progress()
    stream = sys.stderr if stream is None else stream
    isatty = getattr(stream, "isatty", None)
    if isatty is not None and isatty():
        from rich.console import Console

        return BarProgress(Console(file=stream))
    return LineProgress(stream)


class _Counting(Progress):
    """Shared bookkeeping: the current pass, its block count under a lock, its clock."""

    def __init__(self, clock=time.perf_counter) -> None:
        # advance() comes from the engine's worker threads; one lock keeps the count exact
        self._lock = threading.Lock()
        self._clock = clock
        self._label: str | None = None
        self._total = 0
        self._done = 0
        self._t0 = 0.0

    def start(self, label: str, total: int) -> None:
        with self._lock:
            self._label, self._total, self._done = label, int(total), 0
            self._t0 = self._clock()

    def advance(self, n: int = 1) -> None:
        with self._lock:
            self._done += n

    def _end(self) -> tuple[str, int, float] | None:
        """Close the current pass: ``(label, blocks done, seconds)``, or ``None`` if none."""
        with self._lock:
            if self._label is None:
                return None
            label, done = self._label, self._done
            self._label = None
            return label, done, self._clock() - self._t0


class LineProgress(_Counting):
    """One plain line per finished pass and per note, for logs, pipes and cron.

    A line reads ``rain_sum_3m (layer rain): 36 blocks in 2.1 s``; no colour,
    no cursor movement, flushed at once so a log shows how far a run got.

    Parameters
    ----------
    stream : file
        A text stream (standard error in the command line).
    clock : callable, optional
        Seconds as a float; :func:`time.perf_counter` by default.
    """

    def __init__(self, stream, clock=time.perf_counter) -> None:
        super().__init__(clock)
        self.stream = stream

    def _line(self, text: str) -> None:
        with self._lock:  # whole lines, even if two threads write
            self.stream.write(text + "\n")
            self.stream.flush()

    def note(self, text: str) -> None:
        """Print ``text`` as its own line."""
        self._line(text)

    def finish(self) -> None:
        """Print the pass's line: its label, the blocks it read and the seconds it took."""
        ended = self._end()
        if ended is not None:
            label, done, seconds = ended
            self._line(f"{label}: {blocks_text(done)} in {seconds:.1f} s")


class BarProgress(_Counting):
    """A rich bar per pass on a terminal: label, bar, blocks done/total, elapsed time.

    ``total`` is an upper bound (the layer's blocks); :meth:`finish` closes
    the bar at the blocks actually read, so the last frame shows the real count.

    Parameters
    ----------
    console : rich.console.Console
        The console to draw on (standard error in the command line).
    clock : callable, optional
        Seconds as a float; :func:`time.perf_counter` by default.
    """

    def __init__(self, console, clock=time.perf_counter) -> None:
        super().__init__(clock)
        self.console = console
        self._bar = None
        self._task = None

    def note(self, text: str) -> None:
        """Print ``text`` above the bars (no markup: brackets in it stay as they are)."""
        self.console.print(text, markup=False, highlight=False, soft_wrap=True)

    def start(self, label: str, total: int) -> None:
        """Draw a new bar for the pass ``label`` of at most ``total`` blocks."""
        from rich.progress import BarColumn, MofNCompleteColumn, TextColumn, TimeElapsedColumn
        from rich.progress import Progress as RichProgress

        if self._bar is not None:  # a pass that was never finished is closed first
            self.finish()
        super().start(label, total)
        self._bar = RichProgress(
            TextColumn("{task.description}"),
            BarColumn(),
            MofNCompleteColumn(),
            TextColumn("blocks"),
            TimeElapsedColumn(),
            console=self.console,
            transient=False,
        )
        # a bar needs a positive total; a pass that reads nothing shows 0/0 when it finishes
        self._task = self._bar.add_task(label, total=max(int(total), 1))
        self._bar.start()

    def advance(self, n: int = 1) -> None:
        """Move the bar by ``n`` blocks (thread-safe)."""
        with self._lock:
            self._done += n
            done, bar = self._done, self._bar
            if bar is not None:
                # the expected total is an upper bound; grow it rather than overflow
                bar.update(self._task, completed=done, total=max(self._total, done, 1))

    def finish(self) -> None:
        """Close the bar at the blocks actually read (``done/done``)."""
        bar, task = self._bar, self._task
        ended = self._end()
        if bar is None:
            return
        done = ended[1] if ended is not None else 0
        bar.update(task, total=done, completed=done)
        bar.stop()
        self._bar = self._task = None


def as_factory(progress: Progress):
    """Adapt a :class:`Progress` to the older ``(description, total) -> advance`` shape.

    The returned factory starts a pass; the ``advance(n, done=False)`` it
    returns counts blocks, and ``advance(0, done=True)`` finishes the pass.
    """

    def factory(description: str, total: int):
        progress.start(description, total)

        def advance(n: int = 1, done: bool = False) -> None:
            if n:
                progress.advance(n)
            if done:
                progress.finish()

        return advance

    return factory


def rich_progress():
    """The factory the run still calls: stderr's receiver from :func:`make_progress`."""
    return as_factory(make_progress(quiet=False))
