"""Progress events of a run, as a small receiver class the caller fills in.

The library never draws anything: a run calls the methods of a
:class:`Progress` it was given, and the command line passes one that draws a
rich bar on a terminal or prints plain lines into a log. The base class is
silent, so ``Progress()`` means "no progress".
"""

from __future__ import annotations

__all__ = ["Progress"]


class Progress:
    """Receiver of a run's progress events; every method is a no-op here.

    A run calls, for each covariate pass in turn: :meth:`start` with a label
    and the number of raster blocks it expects to read (an upper bound, 0
    when nothing will be read), :meth:`advance` as blocks finish (possibly
    from worker threads), then :meth:`finish`. :meth:`note` carries one-off
    messages (for example that the compiled kernels are being built once).
    """

    def note(self, text: str) -> None:
        """A one-off message for the user (plain text, no markup)."""

    def start(self, label: str, total: int) -> None:
        """A pass begins: ``label`` names the covariate and layer, ``total`` its blocks."""

    def advance(self, n: int = 1) -> None:
        """``n`` more blocks are done (may be called from worker threads)."""

    def finish(self) -> None:
        """The current pass ended (its real block count may be below ``total``)."""
