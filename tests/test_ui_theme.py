"""Stepper's own colour theme, and the screens without colour (NO_COLOR) or beyond ASCII (TERM=dumb).

The 16-colour checks use Rich's own conversion to the standard palette, which is
what Textual's output goes through on a terminal such as ``TERM=xterm``; the
colour meanings they ask for (red means a problem, the selection is not red)
are common practice, not a published rule. NO_COLOR's meaning is the one
published at https://no-color.org (no ANSI colour when it is set).
"""

from __future__ import annotations

from typing import Any

import pytest
from rich.color import Color as RichColor
from rich.color import ColorSystem
from rich.segment import Segment
from rich.style import Style
from textual.color import Color
from textual.pilot import Pilot

from stepper.formats.model_file import load_setup
from stepper.scenarios import default_model
from stepper.session import Session
from stepper.ui.app import StepperApp
from stepper.ui.panels import StatusLine
from stepper.ui.theme import THEME, AsciiOnly, NoColour, ascii_only, drawing_mode

#: The standard palette's numbers by colour family (0-7 normal, 8-15 bright).
RED, YELLOW, BLUE, CYAN = {1, 9}, {3, 11}, {4, 12}, {6, 14}


def standard(color: RichColor | None) -> int | None:
    """The number of the 16-colour palette entry that Rich writes for ``color``."""
    if color is None:
        return None
    return color.downgrade(ColorSystem.STANDARD).number


@pytest.fixture
def session() -> Session:
    return Session(load_setup(default_model()))


def test_the_app_runs_its_own_registered_theme(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        assert app.theme == THEME.name == "stepper-dusk"
        assert app.get_theme(THEME.name) is THEME
        assert app.drawing == "colour"

    drive(session, check)


def test_every_role_keeps_its_meaning_in_16_colours(session: Session, drive, monkeypatch) -> None:
    monkeypatch.delenv("NO_COLOR", raising=False)
    monkeypatch.setenv("TERM", "xterm")

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        table = app.table
        assert table.has_focus
        cursor = table.rich_style + table.get_component_rich_style("weights--cursor")
        # The selection bar: not red (which reads as an error), and its text stands out from it.
        assert standard(cursor.bgcolor) in BLUE | CYAN, cursor
        assert standard(cursor.color) != standard(cursor.bgcolor)
        disagree = table.rich_style + table.get_component_rich_style("weights--disagree")
        assert standard(disagree.color) in RED
        doubtful = table.rich_style + table.get_component_rich_style("weights--doubtful")
        assert standard(doubtful.color) in YELLOW
        # Plain text, muted text and headers stay readable on their backgrounds.
        for part in ("weights--stale", "weights--header", "weights--frozen"):
            style = table.rich_style + table.get_component_rich_style(part)
            assert standard(style.color) != standard(style.bgcolor), part
        status = app.query_one(StatusLine).rich_style
        assert standard(status.color) != standard(status.bgcolor)
        variables = app.get_css_variables()
        background = standard(RichColor.parse(variables["footer-background"]))
        assert standard(RichColor.parse(variables["footer-key-foreground"])) not in {background} | RED

    drive(session, check)


@pytest.mark.parametrize("environ,mode", [
    ({"TERM": "xterm-256color"}, "colour"),
    ({"TERM": "xterm", "NO_COLOR": "1"}, "mono"),
    ({"TERM": "xterm", "NO_COLOR": ""}, "mono"),
    ({"TERM": "dumb"}, "plain"),
    ({"TERM": "dumb", "NO_COLOR": "1"}, "plain"),
    ({}, "colour"),
])
def test_the_drawing_mode_follows_no_color_and_term(environ: dict[str, str], mode: str) -> None:
    assert drawing_mode(environ) == mode


def test_no_colour_drops_every_colour_and_keeps_the_text_styles() -> None:
    style = Style(color="red", bgcolor="#123456", bold=True, reverse=True, dim=True)
    out = NoColour().apply([Segment("abc", style), Segment("plain")], Color(0, 0, 0))
    assert [s.text for s in out] == ["abc", "plain"]
    assert out[0].style is not None and out[0].style.color is None and out[0].style.bgcolor is None
    assert out[0].style.bold and out[0].style.reverse and out[0].style.dim
    assert out[1].style is None


def test_ascii_only_draws_frames_and_plots_in_ascii() -> None:
    assert ascii_only("┌┬──┐\n1.4┤o  │\n└┴──┘") == "++--+\n1.4+o  |\n++--+"
    assert ascii_only("cut…") == "cut~"
    # A character of two cells becomes two stand-ins, so columns stay where they were.
    assert ascii_only("a\u4e2db") == "a??b"
    out = AsciiOnly().apply([Segment("─ title ─", Style(bold=True))], Color(0, 0, 0))
    assert out[0].text == "- title -" and out[0].style == Style(bold=True)


@pytest.mark.parametrize("environ,ascii", [({"NO_COLOR": "1", "TERM": "xterm"}, False),
                                           ({"TERM": "dumb"}, True)])
def test_a_render_without_colour_carries_no_colour(session: Session, drive, monkeypatch,
                                                   environ: dict[str, str], ascii: bool) -> None:
    monkeypatch.delenv("NO_COLOR", raising=False)
    for name, value in environ.items():
        monkeypatch.setenv(name, value)

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        assert app.no_color
        await pilot.press("s")
        await pilot.pause()
        seen = 0
        for widget in app.screen.walk_children():
            if not widget.display or not widget.size.area:
                continue
            for strip in widget.render_lines(widget.region.reset_offset):
                for segment in strip:
                    seen += 1
                    if segment.style is not None:
                        assert segment.style.color is None and segment.style.bgcolor is None, (widget, segment)
                    if ascii:
                        assert segment.text.isascii(), (widget, segment)
        assert seen > 100
        cursor = app.table.rich_style + app.table.get_component_rich_style("weights--cursor")
        assert cursor.reverse  # the selection still shows, by reversed text

    drive(session, check, size=(80, 24))
