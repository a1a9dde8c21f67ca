"""How ``backfill`` shows its progress: a rich progress bar on a terminal (studies done of the
total, rate, time left), plain log lines otherwise (at most one every few seconds, and the
last), and notes (an archive that stopped answering, a study that failed) either way."""

from __future__ import annotations

import logging
import sys
import time
from typing import IO, Any, Protocol

log = logging.getLogger("diastolic_sr.backfill")


class Progress(Protocol):
    def start(self, total: int, what: str) -> None: ...

    def advance(self, done: int, detail: str) -> None: ...

    def note(self, text: str) -> None: ...

    def stop(self) -> None: ...


def rate_text(done: int, elapsed: float, total: int) -> str:
    """``2.4 studies/s, about 1 min 5 s left`` (what the plain lines say)."""
    if done <= 0 or elapsed <= 0:
        return "rate not known yet"
    rate = done / elapsed
    left = max(0, total - done) / rate if rate > 0 else 0.0
    return f"{rate:.2f} studies/s, about {_duration(left)} left"


def _duration(seconds: float) -> str:
    s = round(seconds)
    if s < 60:
        return f"{s} s"
    m, s = divmod(s, 60)
    if m < 60:
        return f"{m} min {s} s"
    h, m = divmod(m, 60)
    return f"{h} h {m} min"


class PlainProgress:
    """One line at most every ``every`` seconds, and at the end."""

    def __init__(self, stream: IO[str] | None = None, every: float = 5.0) -> None:
        self.stream = stream or sys.stderr
        self.every = every
        self.total = 0
        self.what = ""
        self._started = 0.0
        self._last = 0.0
        self._done = 0
        self._detail = ""

    def _line(self, text: str) -> None:
        print(text, file=self.stream, flush=True)

    def start(self, total: int, what: str) -> None:
        self.total, self.what = total, what
        self._started = self._last = time.monotonic()
        self._line(f"backfill: {what}: {total} stud{'y' if total == 1 else 'ies'} to do")

    def advance(self, done: int, detail: str) -> None:
        self._done, self._detail = done, detail
        now = time.monotonic()
        if done >= self.total or now - self._last >= self.every:
            self._last = now
            self._report(now)

    def _report(self, now: float) -> None:
        self._line(
            f"backfill: {self._done}/{self.total} studies done ({self._detail}); "
            f"{rate_text(self._done, now - self._started, self.total)}"
        )

    def note(self, text: str) -> None:
        self._line(f"backfill: {text}")

    def stop(self) -> None:
        if self.total and self._done < self.total:
            self._report(time.monotonic())


class RichProgress:
    """rich's progress bar on the terminal; log records go above it while it runs."""

    def __init__(self) -> None:
        from rich.console import Console

        self.console = Console(stderr=True)
        self._progress: Any = None
        self._task: Any = None
        self._handlers: list[logging.Handler] = []

    def start(self, total: int, what: str) -> None:
        from rich.logging import RichHandler
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeElapsedColumn,
            TimeRemainingColumn,
        )

        self.console.print(
            f"{what}: {total} stud{'y' if total == 1 else 'ies'} to do", highlight=False
        )
        self._progress = Progress(
            BarColumn(bar_width=24),
            MofNCompleteColumn(),
            TextColumn("studies"),
            TextColumn("{task.fields[rate]}"),
            TimeElapsedColumn(),
            TimeRemainingColumn(),
            TextColumn("left"),
            TextColumn("{task.fields[detail]}"),
            console=self.console,
            transient=False,
        )
        self._task = self._progress.add_task(what, total=total, rate="", detail="")
        root = logging.getLogger()
        self._handlers = list(root.handlers)
        handler = RichHandler(console=self.console, show_path=False, show_time=False)
        handler.setLevel(min((h.level for h in self._handlers), default=logging.WARNING))
        for h in self._handlers:
            root.removeHandler(h)
        root.addHandler(handler)
        self._progress.start()

    def advance(self, done: int, detail: str) -> None:
        if self._progress is None:
            return
        task = self._progress.tasks[0]
        speed = task.finished_speed or task.speed
        rate = f"{speed:.2f}/s" if speed else "-/s"
        self._progress.update(self._task, completed=done, rate=rate, detail=detail)

    def note(self, text: str) -> None:
        self.console.print(f"backfill: {text}", highlight=False)

    def stop(self) -> None:
        if self._progress is None:
            return
        self._progress.stop()
        root = logging.getLogger()
        for h in list(root.handlers):
            root.removeHandler(h)
        for h in self._handlers:
            root.addHandler(h)
        self._progress = None


def progress_for(stream: IO[str] | None = None) -> Progress:
    """A progress bar when ``stream`` (default stderr) is a terminal, else plain lines."""
    stream = stream or sys.stderr
    try:
        tty = stream.isatty()
    except (AttributeError, ValueError):
        tty = False
    return RichProgress() if tty else PlainProgress(stream)
