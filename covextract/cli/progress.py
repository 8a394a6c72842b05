"""A rich progress bar for block passes."""

from __future__ import annotations


def rich_progress():
    """Return a progress factory ``(description, total) -> advance(n)``.

    Each call starts a transient bar on stderr that is finished when its
    total is reached.
    """
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

    console = Console(stderr=True)

    def factory(description: str, total: int):
        progress = Progress(
            TextColumn("{task.description}"),
            BarColumn(),
            MofNCompleteColumn(),
            TextColumn("blocks"),
            TimeElapsedColumn(),
            console=console,
            transient=False,
            disable=not console.is_terminal,
        )
        progress.start()
        task = progress.add_task(description, total=max(total, 1))
        state = {"done": 0}
        if total == 0:
            progress.update(task, completed=1)
            progress.stop()

        def advance(n: int = 1) -> None:
            state["done"] += n
            progress.update(task, advance=n)
            if state["done"] >= total:
                progress.stop()

        return advance

    return factory
