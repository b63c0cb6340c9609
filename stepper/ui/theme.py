"""Stepper's look: its own palette, registered with Textual, and what terminals without colour get.

The palette (:data:`THEME`, named ``stepper-dusk``) is dark and quiet: slate
blue frames, a blue selection bar, amber for doubt, red only for a slope that
disagrees or an error. Each colour was picked so that it keeps its meaning when
a terminal has only the 16 standard colours (``TERM=xterm``, ``vt100``): Rich,
which writes Textual's output, maps a colour to the nearest of those, and the
choices here land on blue, cyan, yellow, red and green as intended, never on
red for the selection (tests/test_ui_theme.py checks every role).

Three ways to draw, chosen from the environment by :func:`drawing_mode`:

- ``colour``: the palette;
- ``mono`` (``NO_COLOR`` set, https://no-color.org): no colour code at all, not
  even greys; the selection is reversed, stale numbers are dim, and everything
  that matters is also written in words or marks;
- ``plain`` (``TERM=dumb``): as ``mono``, and only ASCII characters: frames,
  plot axes and the progress bar are drawn with ``- | +``.
"""

from __future__ import annotations

from typing import Mapping

from rich.cells import cell_len
from rich.segment import Segment
from rich.style import Style
from textual.color import Color
from textual.filter import LineFilter
from textual.theme import Theme

THEME = Theme(
    name="stepper-dusk",
    primary="#2c6cb0",      # frames: blue (cyan in 16 colours)
    secondary="#2f8f9f",    # frames of the panels beside the plot: teal (cyan)
    accent="#1f5fbf",       # the selection bar and focus: blue (bright blue)
    warning="#c9a227",      # doubtful, validation cost: amber (yellow)
    error="#d05050",        # disagree, errors: red (bright red)
    success="#3fa84f",      # green
    foreground="#d0d4da",   # text: light grey (white)
    background="#101418",   # black
    surface="#161b21",      # black
    panel="#262d36",        # status line, headers, footer: dark slate (bright black)
    dark=True,
    variables={
        "footer-key-foreground": "#30a0a0",   # keys in the footer: teal (cyan)
        "footer-description-foreground": "#d0d4da",
    },
)

DRAWING_MODES = ("colour", "mono", "plain")


def drawing_mode(environ: Mapping[str, str]) -> str:
    """``plain`` for ``TERM=dumb``, ``mono`` when ``NO_COLOR`` is set (to anything), else ``colour``.

    Textual itself treats any ``NO_COLOR`` as set, empty or not; so does Stepper,
    so the two never disagree.
    """
    if environ.get("TERM", "") == "dumb":
        return "plain"
    if "NO_COLOR" in environ:
        return "mono"
    return "colour"


class NoColour(LineFilter):
    """Drops every colour from the segments, keeping bold, dim, italic, underline and reverse.

    Textual's own filter for ``NO_COLOR`` turns colours into greys (or into the
    terminal's default colour); this one leaves no colour in the output at all.
    """

    def apply(self, segments: list[Segment], background: Color) -> list[Segment]:
        return [
            Segment(text, None if style is None else _without_colour(style), control)
            for text, style, control in segments
        ]


def _without_colour(style: Style) -> Style:
    return style.without_color


#: Box-drawing and block characters that Stepper's widgets and plotext use, and their ASCII stand-ins.
_ASCII = str.maketrans({
    "─": "-", "━": "-", "╌": "-", "┄": "-", "╴": "-", "╶": "-", "╸": "-", "╺": "-",
    "│": "|", "┃": "|", "╎": "|", "┆": "|",
    "┌": "+", "┐": "+", "└": "+", "┘": "+", "├": "+", "┤": "+", "┬": "+", "┴": "+", "┼": "+",
    "▁": " ", "▂": " ", "▃": " ", "▄": " ", "▅": " ", "▆": " ", "▇": " ", "█": "#",
    "•": "o", "·": ".", "…": "~",
})


def ascii_only(text: str) -> str:
    """``text`` in ASCII: box-drawing and block characters by their stand-ins, anything else by ``?``.

    A character that takes two cells becomes ``??``, so the layout keeps its widths.
    """
    text = text.translate(_ASCII)
    if text.isascii():
        return text
    return "".join(ch if ch.isascii() else "?" * cell_len(ch) for ch in text)


class AsciiOnly(LineFilter):
    """Writes every segment's text in ASCII (:func:`ascii_only`), for terminals that show nothing else."""

    def apply(self, segments: list[Segment], background: Color) -> list[Segment]:
        return [Segment(ascii_only(text), style, control) for text, style, control in segments]
