"""Every key of the app in one table: the bindings, the footer and the help screen read it.

Key names are Textual's (``plus`` for ``+``, ``left_square_bracket`` for ``[``,
an upper-case letter for shift plus that letter). ``scope`` says who binds the
key: ``app`` keys work everywhere on the main screen, ``table`` keys move the
weight table's cursor and belong to that widget.
"""

from __future__ import annotations

from dataclasses import dataclass

from textual.binding import Binding


@dataclass(frozen=True)
class Key:
    """One key.

    Attributes:
        keys: Textual key names, comma-separated when several keys do the same.
        action: the ``action_*`` method it runs (without the prefix).
        label: a word or two for the footer.
        help: one line for the help screen.
        group: heading on the help screen.
        footer: place in the key bar at the bottom (1 first); 0 keeps it off the bar. The bar
            shows as many as fit the width, in this order, so a narrow screen keeps the first.
        display: how the key is written on screen.
        scope: ``app`` or ``table``.
        when: the key bar shows it only then: ``job`` (a job runs), ``slice``, ``factors``,
            ``histograms`` or ``range`` (that panel is shown); it then comes first. Empty: always
            (if ``footer``).
    """

    keys: str
    action: str
    label: str
    help: str
    group: str
    footer: int = 0
    display: str | None = None
    scope: str = "app"
    when: str = ""

    @property
    def shown_as(self) -> str:
        """The first key as written on screen."""
        return self.display if self.display is not None else self.keys.split(",")[0]

    @property
    def all_shown(self) -> list[str]:
        """Every key that does this, as written on screen."""
        rest = self.keys.split(",")[1:]
        return [self.shown_as] + [_WRITTEN.get(name, name) for name in rest]


#: How a few key names are written on screen.
_WRITTEN = {"equals_sign": "=", "escape": "esc", "question_mark": "?", "number_sign": "#"}


KEYS: tuple[Key, ...] = (
    # -- descent ---------------------------------------------------------------------------
    Key("s", "step", "step", "take one step of the update rule", "descent", footer=1),
    Key("S", "run_steps", "steps", "run many steps (asks how many); the job bar shows progress, x stops",
        "descent", footer=2),
    Key("x,escape", "cancel_job", "cancel", "cancel the running job (steps or numeric slopes), keeping what is done",
        "descent", display="x", footer=1, when="job"),
    Key("plus,equals_sign", "double_rate", "rate*2", "double the rate", "descent", footer=5,
        display="+"),
    Key("minus", "halve_rate", "rate/2", "halve the rate", "descent", footer=6, display="-"),
    Key("r", "type_rate", "rate", "type a rate", "descent", footer=12),
    Key("u", "choose_rule", "rule", "choose the update rule (gd, momentum, adam)", "descent"),
    Key("g", "toggle_source", "slopes from", "switch the slopes a step follows: analytic or numeric",
        "descent"),
    Key("m", "type_batch", "batch", "type the mini-batch size (empty for the full batch)", "descent"),
    Key("v", "toggle_preview", "rates", "show or hide the rate preview: the cost after one step at each "
        "candidate rate", "descent", footer=9),
    Key("V", "adopt_best_rate", "best rate", "adopt the rate that the preview finds best", "descent",
        footer=10),
    Key("E", "range_test", "explore rates", "rate range test: k steps at each of several rates from here, nothing "
        "kept; the cost each reaches on a log axis (a job; x cancels)", "descent"),
    Key("B", "adopt_range_rate", "adopt", "adopt the rate with the lowest cost in the range test", "descent",
        footer=1, when="range"),
    Key("k", "training_settings", "settings", "training settings: L2 term, weight decay, clipping by slope "
        "norm, rate schedule", "descent"),
    # -- slopes ----------------------------------------------------------------------------
    Key("number_sign", "compute_check", "numeric", "recompute the numeric slopes now (a job; x cancels; a model "
        "over 20,000 weights is checked on a sample of 5,000 first)", "slopes", display="#", footer=4),
    Key("C", "compute_rest", "numeric all", "compute the numeric slopes a pass left out, or all when the "
        "weights changed", "slopes"),
    Key("a", "toggle_auto_check", "auto numeric", "recompute the numeric slopes after every step, "
        "whatever they cost: on/off", "slopes", footer=16),
    # -- weights ---------------------------------------------------------------------------
    Key("f", "freeze_weight", "freeze", "freeze or unfreeze the selected weight", "weights"),
    Key("F", "freeze_layer", "freeze layer", "freeze or unfreeze the whole layer of the selected weight",
        "weights"),
    Key("p", "perturb_weight", "nudge", "perturb the selected weight with Gaussian noise", "weights"),
    Key("P", "perturb_all", "nudge all", "perturb every unfrozen weight with Gaussian noise", "weights"),
    Key("e", "edit_value", "edit", "type a new value for the selected weight", "weights"),
    Key("R", "reset", "reset", "put every weight back to its initial value (undoable)", "weights"),
    Key("z", "undo", "undo", "undo the last operation", "weights", footer=7),
    Key("Z", "redo", "redo", "redo what was undone", "weights"),
    # -- table -----------------------------------------------------------------------------
    Key("up", "cursor(-1)", "up", "select the weight above", "table", display="up", scope="table"),
    Key("down", "cursor(1)", "down", "select the weight below", "table", display="down", scope="table"),
    Key("pageup", "page(-1)", "page up", "one screen up", "table", display="pgup", scope="table"),
    Key("pagedown", "page(1)", "page down", "one screen down", "table", display="pgdn", scope="table"),
    Key("home", "first", "first", "first row", "table", scope="table"),
    Key("end", "last", "last", "last row", "table", scope="table"),
    Key("o", "next_order", "order", "order the rows by the next column (numbers by size, largest first)",
        "table"),
    Key("O", "flip_order", "flip order", "reverse the row order", "table"),
    Key("right_square_bracket", "next_layer", "next layer", "show only the next layer (then all again)",
        "table", display="]"),
    Key("left_square_bracket", "previous_layer", "prev layer", "show only the previous layer", "table",
        display="["),
    Key("slash", "filter_names", "filter", "show only names matching a pattern (* and ? wildcards, "
        "empty shows all)", "table", display="/"),
    Key("j", "jump", "jump", "jump to a weight by name, e.g. L2.W[0,1]", "table"),
    # -- training: rows, metrics, histograms -----------------------------------------------
    Key("d", "show_rows", "samples", "the data rows (samples) with their loss, prediction and target, worst "
        "first, and the metrics; enter on a training row shows its slope factors", "training"),
    Key("percent_sign", "toggle_metric_plot", "metric plot", "plot the accuracy (or R2) per step beside the "
        "cost, from now on", "training", display="%"),
    Key("H", "toggle_histograms", "histograms", "show or hide histograms of the selected weight's layer: "
        "weights, slopes, last updates, activations", "training"),
    Key("semicolon", "next_histogram", "next hist", "histograms: count the next of weights, slopes, last "
        "updates, activations", "training", display=";", footer=1, when="histograms"),
    # -- the samples screen (d) -------------------------------------------------------------
    Key("up", "cursor(-1)", "up", "the row above", "samples", display="up", scope="rows"),
    Key("down", "cursor(1)", "down", "the row below", "samples", display="down", scope="rows"),
    Key("pageup", "page(-1)", "page up", "one screen up", "samples", display="pgup", scope="rows"),
    Key("pagedown", "page(1)", "page down", "one screen down", "samples", display="pgdn", scope="rows"),
    Key("home", "first", "first", "first row", "samples", scope="rows"),
    Key("end", "last", "last", "last row", "samples", scope="rows"),
    Key("o", "next_order", "order", "order by loss, file line or largest error", "samples", scope="rows-screen"),
    Key("O", "flip_order", "flip", "reverse the order", "samples", scope="rows-screen"),
    Key("tab", "next_split", "rows", "list training rows, validation rows, or both", "samples",
        scope="rows-screen"),
    Key("enter", "choose", "factors", "close and show the selected training row's slope factors", "samples",
        scope="rows-screen"),
    Key("escape,d", "close", "close", "close the samples screen", "samples", display="esc", scope="rows-screen"),
    # -- plot and files --------------------------------------------------------------------
    Key("y", "toggle_log", "log cost", "cost plot: log or linear y axis", "plot"),
    Key("w", "save", "save", "save a checkpoint, or export the weights (asks for the path)", "files",
        footer=11),
    Key("l", "load", "load", "load a checkpoint (asks for the path)", "files"),
    Key("question_mark,f1", "help", "help", "this list of keys", "app", footer=-2, display="?"),
    Key("q", "quit", "quit", "quit (asks first when there are unsaved changes)", "app", footer=-1),
    Key("D", "compare_checkpoint", "diff", "compare the current weights with a checkpoint (asks for the "
        "path), as stepper diff does: costs, each layer's change, the weights that moved most", "files"),
    # -- why ---------------------------------------------------------------------------------
    Key("t", "toggle_slice", "slice", "show or hide the cost along the selected weight: its tangent, "
        "its curvature, and where one step at the current rate lands", "why", footer=13),
    Key("greater_than_sign", "widen_span", "wider", "slice: sweep twice as wide", "why", display=">",
        footer=1, when="slice"),
    Key("less_than_sign", "narrow_span", "narrower", "slice: sweep half as wide", "why", display="<",
        footer=2, when="slice"),
    Key("T", "type_span", "span", "slice: type the half-width of the sweep (empty: automatic)", "why",
        footer=3, when="slice"),
    Key("i", "toggle_factors", "factors", "show or hide the selected weight's slope taken apart: error "
        "signal x activation slope x input, averaged and for one sample", "why", footer=14),
    Key("full_stop", "next_sample", "next sample", "factors: show the next sample", "why", display=".",
        footer=1, when="factors"),
    Key("comma", "previous_sample", "prev sample", "factors: show the previous sample", "why",
        display=",", footer=2, when="factors"),
    Key("I", "type_sample", "sample", "factors: type a sample number (empty: the one that contributes "
        "most)", "why", footer=3, when="factors"),
    Key("h", "toggle_health", "health", "show or hide layer health: sizes of weights and slopes, "
        "update-to-weight ratio, saturated and dead units, slopes layer by layer", "why", footer=15),
)

#: Help-screen headings in order.
GROUPS = ("descent", "slopes", "why", "training", "weights", "table", "samples", "plot", "files", "app")


def bindings(scope: str) -> list[Binding]:
    """Textual bindings for the keys of one scope (the key bar, not Textual's footer, shows them)."""
    return [
        Binding(k.keys, k.action, k.label, show=False, key_display=k.display)
        for k in KEYS
        if k.scope == scope
    ]


def bar_keys(context: frozenset[str] = frozenset()) -> tuple[list[Key], list[Key]]:
    """The keys of the key bar: ``(in order of importance, the ones that end the bar)``.

    First the keys whose ``when`` is in ``context`` (``job``, ``slice``,
    ``factors``), then the other numbered keys; ``?`` and ``q`` carry negative
    numbers and end the bar, which drops other keys before them.
    """
    shown = [k for k in KEYS if k.footer > 0 and (not k.when or k.when in context)]
    first = sorted((k for k in shown if k.when), key=lambda k: k.footer)
    rest = sorted((k for k in shown if not k.when), key=lambda k: k.footer)
    return first + rest, sorted((k for k in KEYS if k.footer < 0), key=lambda k: k.footer)
