"""Keys that change weights (freeze, perturb, type a value, reset, undo, redo) and the view of the table."""

from __future__ import annotations

from textual import on

from stepper.core.nearest import unknown_name
from stepper.ui.base import AppBase, log, parse_float
from stepper.ui.weights import WeightTable


class EditKeys(AppBase):
    """Changes to weights, each one undoable session operation."""

    def action_freeze_weight(self) -> None:
        index = self.selected()
        if index is not None:
            self.apply(lambda: self.session.toggle_freeze([index]))

    def action_freeze_layer(self) -> None:
        index = self.selected()
        if index is not None:
            layer = int(self.session.net.layout.layer_index[index])
            self.apply(lambda: self.session.toggle_freeze(self.session.layer_indices(layer)))

    def action_perturb_weight(self) -> None:
        index = self.selected()
        if index is not None:
            self.apply(lambda: self.session.perturb(self.noise, [index]))

    def action_perturb_all(self) -> None:
        self.apply(lambda: self.session.perturb(self.noise))

    def action_edit_value(self) -> None:
        index = self.selected()
        if index is None or self.busy():
            return
        name = self.session.names[index]
        self.ask(f"Value of {name}", "New value:", f"{self.session.theta[index]:.17g}",
                 lambda text: self.apply(lambda: self.session.set_value(index, parse_float(text, name))))

    def action_reset(self) -> None:
        self.apply(self.session.reset)

    def action_undo(self) -> None:
        names: list[str | None] = []
        if self.apply(lambda: names.append(self.session.undo())) and names[0] is None:
            self.say("nothing to undo")

    def action_redo(self) -> None:
        names: list[str | None] = []
        if self.apply(lambda: names.append(self.session.redo())) and names[0] is None:
            self.say("nothing to redo")


class ViewKeys(AppBase):
    """The table's order and filters, jumping to a weight, the plot's scale: view only, allowed while a job runs."""

    def action_next_order(self) -> None:
        self.table.next_order()

    def action_flip_order(self) -> None:
        self.table.flip_order()

    def action_next_layer(self) -> None:
        self.table.step_layer(1)

    def action_previous_layer(self) -> None:
        self.table.step_layer(-1)

    def action_filter_names(self) -> None:
        self.ask("Filter", "Show names matching (* and ? are wildcards; empty shows all):",
                 self.table.pattern, self.table.set_pattern, placeholder="e.g. L1.W*")

    def action_jump(self) -> None:
        layout = self.session.net.layout

        def go(text: str) -> None:
            try:
                index = layout.lookup(text.strip())
            except KeyError:
                self.say(f"no weight is called {text.strip()!r} ({unknown_name(layout, text)})",
                         error=True)
                return
            self.table.select(index)

        self.ask("Jump", "Weight name:", "", go, placeholder=f"e.g. {layout.names[-1]}")

    def action_toggle_log(self) -> None:
        self.plot.log_scale = not self.plot.log_scale

    @on(WeightTable.ViewChanged)
    def _view_changed(self, event: WeightTable.ViewChanged) -> None:
        log.debug("table: %s", event.description)
