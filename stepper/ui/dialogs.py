"""Modal screens: a typed value, a choice from a list, the quit question, the key list.

Each screen returns its answer through ``dismiss``; the app passes a callback
to ``push_screen`` and acts on the answer. None of them touches the session.
"""

from __future__ import annotations

from typing import ClassVar, Sequence

from rich.table import Table
from rich.text import Text
from textual import events, on
from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import Vertical, VerticalScroll
from textual.screen import ModalScreen
from textual.widgets import Input, Label, OptionList, Static
from textual.widgets.option_list import Option

from stepper.ui.keys import GROUPS, KEYS


class AskScreen(ModalScreen[str | None]):
    """Ask for one typed value; the answer is the text, or None when cancelled.

    | Key | Does |
    | --- | --- |
    | enter | accept the text |
    | escape | cancel |
    """

    BINDINGS: ClassVar[list[BindingType]] = [Binding("escape", "cancel", "cancel")]
    AUTO_FOCUS = "#answer"

    def __init__(self, title: str, prompt: str, value: str = "", placeholder: str = "") -> None:
        super().__init__()
        self.title_text = title
        self.prompt = prompt
        self.value = value
        self.placeholder = placeholder

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog"):
            yield Label(self.title_text, classes="dialog-title")
            yield Label(self.prompt)
            yield Input(value=self.value, placeholder=self.placeholder, id="answer")
            yield Label("enter accepts, esc cancels", classes="dialog-hint")

    @on(Input.Submitted, "#answer")
    def _submitted(self, event: Input.Submitted) -> None:
        self.dismiss(event.value)

    def action_cancel(self) -> None:
        self.dismiss(None)


class ChoiceScreen(ModalScreen[str | None]):
    """Pick one of a few named choices; the answer is its name, or None when cancelled.

    | Key | Does |
    | --- | --- |
    | up / down | move |
    | enter | pick |
    | 1-9 | pick by number |
    | escape | cancel |
    """

    BINDINGS: ClassVar[list[BindingType]] = [Binding("escape", "cancel", "cancel")]

    def __init__(self, title: str, choices: Sequence[tuple[str, str]], current: str) -> None:
        """``choices`` are ``(name, description)`` pairs."""
        super().__init__()
        self.title_text = title
        self.choices = list(choices)
        self.current = current

    def compose(self) -> ComposeResult:
        options = [
            Option(f"{i + 1}  {name:<10} {text}{'  (now)' if name == self.current else ''}", id=name)
            for i, (name, text) in enumerate(self.choices)
        ]
        with Vertical(classes="dialog"):
            yield Label(self.title_text, classes="dialog-title")
            yield OptionList(*options, id="choices")
            yield Label("enter or a number picks, esc cancels", classes="dialog-hint")

    def on_mount(self) -> None:
        options = self.query_one(OptionList)
        names = [name for name, _ in self.choices]
        if self.current in names:
            options.highlighted = names.index(self.current)
        options.focus()

    @on(OptionList.OptionSelected, "#choices")
    def _picked(self, event: OptionList.OptionSelected) -> None:
        self.dismiss(event.option.id)

    def on_key(self, event: events.Key) -> None:
        if event.character is not None and event.character.isdigit():
            number = int(event.character)
            if 1 <= number <= len(self.choices):
                event.stop()
                self.dismiss(self.choices[number - 1][0])

    def action_cancel(self) -> None:
        self.dismiss(None)


class QuitScreen(ModalScreen[str]):
    """Unsaved changes: ``y`` quits anyway, ``w`` saves first, any other key stays.

    The answer is ``"quit"``, ``"save"`` or ``"stay"``.
    """

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog"):
            yield Label("Quit with unsaved changes?", classes="dialog-title")
            yield Label("y  quit without saving\nw  save a checkpoint first, then quit\n"
                        "any other key  stay")

    def on_key(self, event: events.Key) -> None:
        event.stop()
        event.prevent_default()
        if event.key == "y":
            self.dismiss("quit")
        elif event.key == "w":
            self.dismiss("save")
        else:
            self.dismiss("stay")


class ConfirmScreen(ModalScreen[bool]):
    """A yes/no question: ``y`` answers yes, any other key no.

    ``question`` is the title, ``detail`` (wrapped at word boundaries, a long
    path included) says what it is about, ``yes`` what ``y`` does.
    """

    def __init__(self, question: str, detail: str = "", yes: str = "yes") -> None:
        super().__init__()
        self.question = question
        self.detail = detail
        self.yes = yes

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog"):
            yield Label(self.question, classes="dialog-title")
            if self.detail:
                yield Label(self.detail, id="detail")
            yield Label(f"y  {self.yes}\nany other key  no", id="keys")

    def on_key(self, event: events.Key) -> None:
        event.stop()
        event.prevent_default()
        self.dismiss(event.key == "y")


def help_rows() -> list[tuple[str, str, str]]:
    """``(group, keys, what it does)`` for every key, in help-screen order."""
    return [(group, " ".join(k.all_shown), k.help) for group in GROUPS for k in KEYS if k.group == group]


HELP_NOTE = ("Numbers are in scientific notation, with more digits when the table has the room. Verdicts "
             "are words: agree, doubtful, disagree, kink (the numeric slope crossed a kink and is not "
             "trusted), - (not checked), stale (the weights changed since the numeric slopes were computed: "
             "numeric* and rel.err* in the header). While a numeric pass takes less than the budget "
             "(--numeric-budget, default 50 ms) the slopes are recomputed after every change by themselves; "
             "the status line says when they are not. Messages appear in the status line: last: for what "
             "was done, problem: for what was refused or failed, why: for the likely cause of disagreeing "
             "slopes.\n\n"
             "Slice (t): along one weight a step multiplies the distance to the minimum by "
             "1 - rate x curvature, so below 1 it stops short, between 1 and 2 it overshoots, above 2 "
             "steps diverge, and 1/curvature is the best rate along that weight (LeCun, Bottou, Orr & "
             "Mueller, \"Efficient BackProp\", 1998, section 5.1; recalled from memory). Thresholds in the "
             "factors (i) and health (h) panels are common practice, without a published source.")


def help_table() -> Table:
    """Every key and what it does, grouped; long lines wrap under their own column."""
    table = Table(show_header=False, box=None, padding=(0, 1), expand=True)
    table.add_column("key", no_wrap=True, style="bold", width=8)
    table.add_column("does", ratio=1)
    group = None
    for name, keys, text in help_rows():
        if name != group:
            if group is not None:
                table.add_row("", "")
            table.add_row(Text(name, style="bold underline"), "")
            group = name
        table.add_row(keys, text)
    table.add_row("", "")
    table.add_row("", HELP_NOTE)
    return table


class HelpScreen(ModalScreen[None]):
    """The list of keys; escape, q or ? closes it, arrows scroll it."""

    BINDINGS: ClassVar[list[BindingType]] = [
        Binding("escape,q,question_mark", "close", "close"),
    ]

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog help"):
            yield Label("Keys (esc closes, arrows scroll)", classes="dialog-title")
            with VerticalScroll(id="help-body"):
                yield Static(help_table(), id="help-text")

    def on_mount(self) -> None:
        self.query_one("#help-body").focus()

    def action_close(self) -> None:
        self.dismiss(None)
