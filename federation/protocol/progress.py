"""Progress shown to a person at a terminal: records read, sites answered, a live table of site status.

Everything here writes to stderr and only when stderr is a terminal, so piped output, ``--json`` output and
log files stay plain (one line per event, printed by the commands themselves). Nothing shown here holds a
record's value: only counts of records read and each site's status and reason.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from typing import Any

# A site's round status that means it has answered one way or another (see federation/deploy/rounds.py).
ANSWERED = frozenset({"released", "ready", "failed", "refused", "rejected", "unreachable", "held", "not asked"})


def interactive() -> bool:
    """True when stderr is a terminal a person is watching."""
    try:
        return sys.stderr.isatty()
    except (AttributeError, ValueError):
        return False


@contextmanager
def records_progress(label: str = "records read") -> Iterator[Callable[[int], None] | None]:
    """Yield a callback taking the number of records just read, or None when stderr is not a terminal.

    The total is not known in advance (a CSV is streamed), so the bar counts up with a spinner.
    """
    if not interactive():
        yield None
        return
    from rich.console import Console
    from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

    progress = Progress(
        SpinnerColumn(),
        TextColumn("{task.description}: {task.completed:,.0f}"),
        TimeElapsedColumn(),
        console=Console(stderr=True),
        transient=True,
    )
    task = progress.add_task(label, total=None)
    with progress:
        yield lambda rows: progress.advance(task, rows)


class SiteTable:
    """A live table of site status with a bar of sites answered, redrawn on every update (terminal only).

    The table appears with the first update (when the round has sites), so an error before that is one line.
    """

    def __init__(self, title: str) -> None:
        from rich.console import Console

        self.title = title
        self.console = Console(stderr=True)
        self._sites: dict[str, dict[str, Any]] = {}
        self._live: Any = None

    def __enter__(self) -> SiteTable:
        return self

    def __exit__(self, *exc: object) -> None:
        if self._live is not None:
            self._live.update(self._render())
            self._live.stop()
            self._live = None

    def say(self, line: str) -> None:
        """Print a line above the table."""
        self.console.print(line, markup=False, highlight=False)

    def update(self, sites: Mapping[str, Mapping[str, Any]]) -> None:
        self._sites = {name: dict(info) for name, info in sites.items()}
        if self._live is None:
            from rich.live import Live

            self._live = Live(self._render(), console=self.console, refresh_per_second=4)
            self._live.start()
        else:
            self._live.update(self._render())

    def _render(self) -> Any:
        from rich.console import Group
        from rich.progress_bar import ProgressBar
        from rich.table import Table
        from rich.text import Text

        table = Table(title=self.title, title_justify="left", expand=False)
        table.add_column("site")
        table.add_column("status")
        table.add_column("reason", overflow="fold", max_width=70)
        for name, info in sorted(self._sites.items()):
            status = str(info.get("status", ""))
            style = {
                "released": "bold",
                "ready": "bold",
                "refused": "reverse",
                "failed": "reverse",
                "unreachable": "dim",
            }.get(status, "")
            table.add_row(name, Text(status, style=style), str(info.get("reason") or ""))
        answered = sum(str(info.get("status")) in ANSWERED for info in self._sites.values())
        total = max(len(self._sites), 1)
        bar = ProgressBar(total=total, completed=answered, width=40)
        return Group(table, Text(f"sites answered {answered}/{len(self._sites)}"), bar)
