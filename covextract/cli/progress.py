"""A rich progress bar for block passes."""

from __future__ import annotations


def rich_progress():
    """Return a progress factory ``(description, total) -> advance(n)``.

    Each call starts a bar on stderr; its total is an upper bound (the
    layer's blocks) and ``advance(0, done=True)`` closes it at the blocks
    actually read.
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

        def advance(n: int = 1, done: bool = False) -> None:
            """Count ``n`` finished blocks; ``done=True`` closes the bar."""
            state["done"] += n
            if done:
                progress.update(task, total=max(state["done"], 1), completed=max(state["done"], 1))
                progress.stop()
                return
            if state["done"] > total:
                progress.update(task, total=state["done"])
            progress.update(task, advance=n)

        return advance

    return factory
