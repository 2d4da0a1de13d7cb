"""What a plan is doing and how far it is, drawn on a terminal with rich (or not at all)."""

from __future__ import annotations

import contextlib
import time


def _ignore(*_args) -> None:
    """A progress report nobody watches."""


class Progress:
    """What a plan is doing and how far it is, for a person watching a terminal.

    With a ``rich.console.Console`` it draws one line per stage (what, a bar, the share
    done, the time taken) and prints notes above them; without one (``-q``, or output
    that is not a terminal) every call does nothing, so scripts and logs get only the
    command's own output. Use it as a context manager around the work it reports on.

    Parameters
    ----------
    console : rich.console.Console or None
        Where to draw; None for no display.
    """

    def __init__(self, console=None):
        self.started = time.perf_counter()
        self._bars = None
        if console is not None:
            from rich.progress import BarColumn, TaskProgressColumn, TextColumn, TimeElapsedColumn
            from rich.progress import Progress as Bars

            # every line starts with the time into the run at which its stage began
            self._bars = Bars(TextColumn("[{task.fields[at]:6.1f} s]", markup=False),
                              TextColumn("{task.description}", markup=False), BarColumn(bar_width=24),
                              TaskProgressColumn(), TimeElapsedColumn(), console=console, redirect_stdout=False,
                              redirect_stderr=False)

    def __enter__(self) -> Progress:
        if self._bars is not None:
            self._bars.start()
        return self

    def __exit__(self, *exc) -> None:
        if self._bars is not None:
            self._bars.stop()

    def elapsed_s(self) -> float:
        """Seconds since the run began."""
        return time.perf_counter() - self.started

    def __call__(self, message: str) -> None:
        """A note above the bars: a fact worth seeing while the run goes on."""
        if self._bars is not None:
            self._bars.console.print(f"[{self.elapsed_s():6.1f} s] {message}", markup=False, highlight=False,
                                     soft_wrap=True)

    @contextlib.contextmanager
    def task(self, what: str, total: int | None = None):
        """A stage of the run, shown while it works; yields ``report(done, total=None)``.

        A stage without a ``total`` shows a moving bar until it ends. A stage that ends
        with an exception is left where it stopped.
        """
        if self._bars is None:
            yield _ignore
            return
        bars = self._bars
        task_id = bars.add_task(what, total=total, at=self.elapsed_s())

        def report(done, new_total=None) -> None:
            bars.update(task_id, completed=done, total=new_total if new_total is not None else bars.tasks[
                task_id].total)

        yield report
        done = bars.tasks[task_id].total or 1
        bars.update(task_id, total=done, completed=done)
