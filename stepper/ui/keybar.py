"""The key bar at the bottom of the screen: as many keys as the width holds, most useful first.

It reads :mod:`stepper.ui.keys`, as the bindings and the help screen do, so the
three never disagree. The order is the keys' ``footer`` numbers; keys that
belong to the moment (``x`` while a job runs, the slice's ``< > T`` while it is
shown) come first, and ``? help`` and ``q quit`` always end the bar. A key is
shown whole or not at all: nothing is ever cut in the middle of a word.
"""

from __future__ import annotations

from typing import ClassVar

from rich.style import Style
from rich.text import Text
from textual.widgets import Static

from stepper.ui.keys import Key, bar_keys

#: Cells between two keys.
GAP = 2


def bar_items(width: int, context: frozenset[str] = frozenset()) -> list[Key]:
    """The keys that fit ``width`` cells, in the order drawn (the closing keys last)."""
    ordered, closing = bar_keys(context)

    def cells(keys: list[Key]) -> int:
        return sum(len(k.shown_as) + 1 + len(k.label) for k in keys) + GAP * max(len(keys) - 1, 0) + 1

    chosen: list[Key] = []
    for key in ordered:
        if cells(chosen + [key] + closing) > width:
            break
        chosen.append(key)
    if cells(chosen + closing) > width:
        return chosen
    return chosen + closing


def bar_text(width: int, context: frozenset[str], key_style: Style, label_style: Style) -> Text:
    """The bar as styled text (``key label`` pairs, a space before the first)."""
    text = Text(" ", no_wrap=True)
    for i, key in enumerate(bar_items(width, context)):
        if i:
            text.append(" " * GAP)
        text.append(key.shown_as, key_style)
        text.append(" " + key.label, label_style)
    return text


class KeyBar(Static):
    """One line of keys; the app tells it the context (a job, a panel) and it fits itself to its width."""

    COMPONENT_CLASSES: ClassVar[set[str]] = {"keybar--key", "keybar--label"}

    DEFAULT_CSS = """
    KeyBar {
        height: 1;
        background: $footer-background;
        color: $footer-description-foreground;
    }
    KeyBar > .keybar--key { color: $footer-key-foreground; text-style: bold; }
    KeyBar > .keybar--label { }
    """

    def __init__(self, *, name: str | None = None, id: str | None = None, classes: str | None = None) -> None:
        super().__init__("", name=name, id=id, classes=classes)
        self.context: frozenset[str] = frozenset()

    def set_context(self, context: frozenset[str]) -> None:
        """Show the keys that belong to ``context`` (``job``, ``slice``, ``factors``) first."""
        if context != self.context:
            self.context = context
            self._draw()

    def on_resize(self) -> None:
        self._draw()

    def on_mount(self) -> None:
        self._draw()

    def _draw(self) -> None:
        width = self.content_size.width or 80
        text = bar_text(width, self.context, self.get_component_rich_style("keybar--key"),
                        self.get_component_rich_style("keybar--label"))
        self.update(text, layout=False)

    @property
    def text(self) -> str:
        """The bar as plain text."""
        return bar_text(self.content_size.width or 80, self.context, Style(), Style()).plain
