"""Small display widgets: the status line, the rate preview, the job bar and a base for text panels."""

from __future__ import annotations

import math
import textwrap
from dataclasses import dataclass
from typing import Generic, TypeVar

from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Horizontal
from textual.widgets import Label, ProgressBar, Static

from stepper.core.metrics import main_figure
from stepper.training_report import number
from stepper.ui.snapshot import Snapshot

F = TypeVar("F")


def cost_text(value: float | None) -> str:
    """A cost with enough digits to see a step's effect."""
    if value is None or math.isnan(value):
        return "-"  # none, or not computable (see Snapshot.problem)
    if not math.isfinite(value):
        return "diverges"
    return f"{value:.6g}"


@dataclass(frozen=True)
class Note:
    """Something the app said: a refusal or an error (``error``), or a plain message."""

    text: str
    error: bool = False


@dataclass(frozen=True)
class StatusInfo:
    """What the status line shows besides the snapshot.

    Attributes:
        auto_check: numeric slopes after every step, whatever they cost (the ``a`` key).
        job: the running job's name, or None.
        note: the app's last message; shown instead of the session's last action until the
            next operation.
        numeric: why the numeric slopes are not recomputed by themselves (a pass costs more
            than the budget), or None.
        why: the likely cause of the current disagreements (one sentence), or None.
        journal: why the journal stopped (it could not be written), or None; shown until the app ends.
    """

    auto_check: bool = False
    job: str | None = None
    note: Note | None = None
    numeric: str | None = None
    why: str | None = None
    journal: str | None = None


#: Most lines the last action or message takes; a longer one ends with MORE.
MESSAGE_LINES = 4
MORE = " ... (the rest is in the log)"


def fit_title(variants: list[str], width: int) -> str:
    """The first (fullest) of ``variants`` that fits a border ``width`` cells wide, else the last."""
    room = width - 4  # the corners and a space either side of the title
    for text in variants:
        if len(text) <= room:
            return text
    return variants[-1]


def check_field(snap: Snapshot, info: StatusInfo) -> str:
    """What the status line says about the numeric slopes."""
    if info.job == "numeric slopes":
        return "numeric slopes: computing"
    if not snap.has_check:
        why = f": {info.numeric}" if info.numeric else ""
        return f"numeric slopes not computed{why} (# computes)"
    if snap.stale:
        why = f"; {info.numeric}" if info.numeric else ""
        return f"numeric slopes stale (weights changed since{why}; # recomputes)"
    counts = [(n, snap.counts[name]) for name, n in
              (("agree", "agree"), ("doubtful", "doubtful"), ("disagree", "disagree"), ("kink", "kink"))]
    shown = [f"{count} {name}" for name, count in counts if count] or ["0 checked"]
    part = f" of {snap.n_checked:,} checked (C: all {snap.n_params:,})" if snap.n_checked < snap.n_params else ""
    return "numeric slopes: " + ", ".join(shown) + part


def status_fields(snap: Snapshot, info: StatusInfo) -> list[str]:
    """The pieces of the status line, in reading order; none is ever cut."""
    fields = [f"{snap.name} ({snap.source})"]
    if snap.code:
        fields.append(f"runs the code of {', '.join(snap.code)}: open only files you trust")
    fields += [f"step {snap.step_count}", f"train {cost_text(snap.train_cost)}"]
    if snap.val_cost is not None:
        fields.append(f"val {cost_text(snap.val_cost)}")
    figure = figure_text(snap)
    if figure:
        fields.append(figure)
    rate = f"rate {snap.rate:.4g}"
    if snap.schedule.kind != "constant" and snap.rate:
        rate += f" x{snap.scheduled_rate / snap.rate:.2g}"
    fields += [rate, snap.rule, f"{snap.slope_source} slopes"]
    fields += training_flags(snap)
    if snap.batch_size is not None:
        fields.append(f"batch {snap.batch_size}")
    fields.append(check_field(snap, info))
    if info.auto_check:
        fields.append("numeric after every step")
    if snap.dirty:
        fields.append("unsaved")
    if snap.undo_levels:
        fields.append(f"undo {snap.undo_levels}")
    if info.job:
        fields.append(f"running: {info.job} (x stops)")
    return fields


def message_text(snap: Snapshot, info: StatusInfo) -> str:
    """The last line's text: a problem drawing, the app's last message, or the session's last action."""
    if snap.problem:
        return f"problem: {snap.problem}"
    if info.note is not None:
        return f"{'problem' if info.note.error else 'last'}: {info.note.text}"
    return f"last: {snap.last_action}" if snap.last_action else "last: nothing yet"


def figure_text(snap: Snapshot) -> str:
    """``acc 83%/80%`` (train/validation) or ``R2 0.91/0.88``: the task's main figure, or ""."""
    if snap.metrics is None:
        return ""
    train, val = snap.metrics.train, snap.metrics.validation
    figures = [main_figure(train)] + ([] if val is None else [main_figure(val)])
    if snap.task == "regression":
        return "R2 " + "/".join(number(f, 2) for f in figures)
    return "acc " + "/".join("-" if f != f else f"{100 * f:.0f}%" for f in figures)


def training_flags(snap: Snapshot) -> list[str]:
    """The training settings that are on: ``L2 0.001 (4.2% of cost)``, ``decay 0.01``, ``clip 1``, the schedule."""
    parts = []
    if snap.l2:
        share = snap.penalty / snap.train_cost if snap.train_cost else math.nan
        parts.append(f"L2 {snap.l2:g} ({100 * share:.2g}% of cost)" if math.isfinite(share) else f"L2 {snap.l2:g}")
    if snap.weight_decay:
        parts.append(f"decay {snap.weight_decay:g}")
    if snap.clip_norm is not None:
        parts.append(f"clip {snap.clip_norm:g}")
    if snap.schedule.kind != "constant":
        parts.append(snap.schedule.text())
    return parts


def pack(fields: list[str], width: int, sep: str = "  ") -> list[str]:
    """``fields`` packed into lines of at most ``width`` cells, never breaking one (a field wider
    than ``width`` is wrapped at its spaces)."""
    lines: list[str] = []
    line = ""
    for field in fields:
        if line and len(line) + len(sep) + len(field) <= width:
            line += sep + field
            continue
        if line:
            lines.append(line)
        if len(field) <= width:
            line = field
        else:
            *whole, line = textwrap.wrap(field, width, break_on_hyphens=False)
            lines += whole
    if line:
        lines.append(line)
    return lines


def status_lines(snap: Snapshot, info: StatusInfo, width: int = 78) -> list[str]:
    """The status line's text for ``width`` cells, one string per screen line, every one whole.

    The settings and counts are packed into as few lines as the width allows; the
    last action (or message) starts a line of its own and wraps at word
    boundaries, at most MESSAGE_LINES lines.
    """
    width = max(width, 20)
    lines = pack(status_fields(snap, info), width)
    if info.journal:
        lines += textwrap.wrap(f"JOURNAL STOPPED: {info.journal}", width, break_on_hyphens=False,
                               subsequent_indent="  ")
    if info.why:
        lines += textwrap.wrap(f"why: {info.why}", width, break_on_hyphens=False, subsequent_indent="  ")
    message = textwrap.wrap(message_text(snap, info), width, break_on_hyphens=False, subsequent_indent="  ")
    if len(message) > MESSAGE_LINES:
        message = message[:MESSAGE_LINES]
        message[-1] = textwrap.shorten(message[-1], width - len(MORE), placeholder="") + MORE
    return lines + message


class StatusLine(Static):
    """Model and file, step count, costs, settings, the numeric slopes' state and the last action.

    Its height follows its text (every piece whole at any width); the app hands
    it a snapshot and a :class:`StatusInfo`.
    """

    _lines = 0

    def __init__(self, *, name: str | None = None, id: str | None = None, classes: str | None = None) -> None:
        super().__init__("", name=name, id=id, classes=classes)
        self._shown: tuple[Snapshot, StatusInfo] | None = None

    def show(self, snap: Snapshot, info: StatusInfo) -> None:
        self._shown = (snap, info)
        self._draw()

    def on_resize(self) -> None:
        # After this resize is laid out: a change of height asked for during it would be lost.
        self.call_after_refresh(self._draw)

    def _draw(self) -> None:
        if self._shown is None:
            return
        lines = status_lines(*self._shown, width=self.content_size.width or 78)
        # A layout pass (which redraws the whole screen) only when the number of lines changes.
        self.update(Text("\n".join(lines), no_wrap=True, overflow="ellipsis"), layout=len(lines) != self._lines)
        self._lines = len(lines)

    @property
    def text(self) -> str:
        """The status as plain text."""
        return str(self.content)


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
