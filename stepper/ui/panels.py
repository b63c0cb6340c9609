"""Small display widgets: the status line, the rate preview, the job bar and a base for text panels."""

from __future__ import annotations

import math
import textwrap
from typing import Generic, Sequence, TypeVar

from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Horizontal
from textual.widgets import Label, ProgressBar, Static

from stepper.ui.snapshot import Snapshot

F = TypeVar("F")


def cost_text(value: float | None) -> str:
    """A cost with enough digits to see a step's effect."""
    if value is None or math.isnan(value):
        return "-"  # none, or not computable (see Snapshot.problem)
    if not math.isfinite(value):
        return "diverges"
    return f"{value:.6g}"


def status_lines(snap: Snapshot, auto_check: bool, job: str | None = None) -> list[str]:
    """The status line's text, one string per screen line (each fits 80 columns when it can)."""
    val = "" if snap.val_cost is None else f"  val {cost_text(snap.val_cost)}"
    first = (f"step {snap.step_count}  train {cost_text(snap.train_cost)}{val}  rate {snap.rate:.4g}  "
             f"{snap.rule}  {snap.slope_source} slopes")
    if snap.has_check:
        c = snap.counts
        check = f"{c['agree']} agree {c['doubtful']} doubtful {c['disagree']} DISAGREE {c['kink']} kink"
        if snap.n_checked < snap.n_params:
            check += f" of {snap.n_checked:,} checked (C: all {snap.n_params:,})"
        if snap.stale:
            check += " (stale)"
    else:
        check = "numeric slopes not computed (c)"
    flags = [check]
    if snap.dirty:
        flags.append("unsaved")
    if snap.undo_levels:
        flags.append(f"undo {snap.undo_levels}")
    if snap.batch_size is not None:
        flags.append(f"batch {snap.batch_size}")
    if auto_check:
        flags.append("auto-check")
    second = " | ".join(flags)
    third = f"last: {snap.last_action}" if snap.last_action else "last: nothing yet"
    if snap.problem:
        third = f"PROBLEM: {snap.problem}"
    if job:
        third = f"{job} | {third}"
    return [first, second, third]


class StatusLine(Static):
    """Step count, rate, rule, costs, verdict counts and the last action."""

    def show(self, snap: Snapshot, auto_check: bool, job: str | None = None) -> None:
        # The line count never changes, so no layout pass is needed (a layout redraws the whole screen).
        self.update(Text("\n".join(status_lines(snap, auto_check, job)), no_wrap=True, overflow="ellipsis"),
                    layout=False)


def preview_lines(preview: Sequence[tuple[float, float]], current: float, best: float | None) -> list[str]:
    """Rows of the rate preview: rate, cost after one step, and marks for the current and best rates."""
    lines = []
    for rate, cost in preview:
        marks = []
        if best is not None and rate == best:
            marks.append("best")
        if math.isclose(rate, current, rel_tol=1e-12):
            marks.append("now")
        lead = ">" if best is not None and rate == best else " "
        lines.append(f"{lead}{rate:<10.4g} {cost_text(cost):>10} {' '.join(marks)}".rstrip())
    return lines


class RatePanel(Static):
    """The cost after one step at each candidate rate (the session computes them)."""

    _lines = 0

    def on_mount(self) -> None:
        self.border_title = "cost after 1 step | b: best"

    def show(self, preview: Sequence[tuple[float, float]], current: float, best: float | None) -> None:
        lines = preview_lines(preview, current, best)
        self.update(Text("\n".join(lines), no_wrap=True), layout=len(lines) != self._lines)
        self._lines = len(lines)


class JobBar(Horizontal):
    """What runs now, its progress, and how to cancel it; hidden when nothing runs."""

    DEFAULT_CSS = """
    JobBar {
        height: 1;
        display: none;
    }
    JobBar.-running {
        display: block;
    }
    JobBar Label {
        width: auto;
        padding: 0 1;
    }
    JobBar ProgressBar {
        width: 1fr;
    }
    """

    def compose(self) -> ComposeResult:
        yield Label("", id="job-label")
        yield ProgressBar(total=1, show_eta=False, id="job-progress")
        yield Label("x cancels", id="job-cancel")

    def start(self, label: str, total: int) -> None:
        self.query_one("#job-label", Label).update(label)
        self.query_one(ProgressBar).update(total=max(total, 1), progress=0)
        self.add_class("-running")

    def advance(self, done: int, total: int) -> None:
        self.query_one(ProgressBar).update(total=max(total, 1), progress=done)

    def stop(self) -> None:
        self.remove_class("-running")


class FiguresPanel(Static, Generic[F]):
    """A fixed-size panel of text lines drawn from figures of type ``F``, or a note saying why there are none.

    Subclasses give the border title (:meth:`figures_title`) and the lines for a
    content width (:meth:`figures_lines`); the app feeds the panel.
    """

    def __init__(self, *, name: str | None = None, id: str | None = None, classes: str | None = None) -> None:
        super().__init__("", name=name, id=id, classes=classes)
        self.figures: F | None = None
        self.note = ""

    def figures_title(self, figures: F) -> str:
        """The border title while ``figures`` are shown."""
        raise NotImplementedError

    def figures_lines(self, figures: F, width: int) -> list[str]:
        """The text of ``figures`` for a content ``width``, one string per line."""
        raise NotImplementedError

    def show(self, figures: F) -> None:
        self.figures = figures
        self.border_title = self.figures_title(figures)
        self._draw()

    def show_note(self, title: str, note: str) -> None:
        """No figures: ``note`` says why (no weight selected, a custom layer's parameter, ...)."""
        self.figures = None
        self.note = note
        self.border_title = title
        self._draw()

    def on_resize(self) -> None:
        self._draw()

    def _draw(self) -> None:
        width = self.content_size.width or 78
        if self.figures is not None:
            lines = self.figures_lines(self.figures, width)
        else:
            lines = textwrap.wrap(self.note, max(width, 40))
        # The panel has a fixed size (1fr): no layout pass (which would redraw the whole screen).
        self.update(Text("\n".join(lines), no_wrap=True, overflow="ellipsis"), layout=False)
