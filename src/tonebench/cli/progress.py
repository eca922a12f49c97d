"""Progress bars on stderr for commands that step through readings: the bar appears at the first
step, so a refused command prints its one error line and nothing else; lines printed meanwhile
(live events, warnings) go above it."""

from __future__ import annotations

from rich.progress import BarColumn, MofNCompleteColumn, Progress, TaskID, TextColumn, TimeElapsedColumn, TimeRemainingColumn

from tonebench.cli.common import err


class StepProgress:
    """`with StepProgress("measuring", "points") as bar: work(bar.advance)`; advance(done, total)."""

    def __init__(self, label: str, unit: str, transient: bool = False):
        self.progress = Progress(TextColumn(f"[bold]{label}"), BarColumn(), MofNCompleteColumn(), TextColumn(unit),
                                 TimeElapsedColumn(), TextColumn("ETA"), TimeRemainingColumn(), console=err,
                                 transient=transient)
        self.task: TaskID = self.progress.add_task(label, total=None, start=False)

    def advance(self, done: int, total: int) -> None:
        if not self.progress.live.is_started:
            self.progress.start()
            self.progress.start_task(self.task)
        self.progress.update(self.task, completed=done, total=total)

    def restart(self) -> None:
        """From zero again (the next job of a worker)."""
        self.progress.reset(self.task, total=None, start=False)

    def stop(self) -> None:
        if self.progress.live.is_started:  # a bar never shown leaves nothing behind, not even a newline
            self.progress.stop()

    def __enter__(self) -> "StepProgress":
        return self

    def __exit__(self, *exc_info) -> None:
        self.stop()
