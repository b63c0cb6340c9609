"""Keys of files and of the app itself: save and load checkpoints, help, quit."""

from __future__ import annotations

from pathlib import Path
from typing import Callable

from stepper.formats import user_code
from stepper.errors import StepperError
from stepper.formats.export import export_weights
from stepper.formats.weight_sources import DTYPES
from stepper.formats.weights_export import LAYOUTS
from stepper.ui.base import AppBase
from stepper.ui.dialogs import ConfirmScreen, HelpScreen, QuitScreen


#: Words after the path in the save prompt that make it an export.
EXPORT_WORDS = set(LAYOUTS) | set(DTYPES)



#: Seconds q waits for a cancelled job to end before the app quits anyway.
QUIT_WAIT = 2.0

class FileKeys(AppBase):
    """Checkpoints (through the session), the help screen and quitting."""

    def action_save(self) -> None:
        self.save_then(None)

    def save_then(self, after: Callable[[], None] | None) -> None:
        """Ask for a path and save a checkpoint there; then run ``after`` if the save worked.

        A path ending in ``.onnx``, or followed by a layout word (``torch``, ``stepper``),
        exports the weights instead (``stepper export``); ``float32``/``float64`` picks the type.
        """
        if self.busy():
            return

        def write(path: Path, export: tuple[str | None, str | None] | None) -> None:
            if export is not None:
                self._export(path, *export)
            elif self.apply(lambda: self.session.save_checkpoint(path)):
                self.say(f"saved {path}")
                if after is not None:
                    after()

        def chosen(text: str) -> None:
            words = text.split()
            options: list[str] = []
            while words and words[-1] in EXPORT_WORDS:
                options.insert(0, words.pop())
            if not words:
                self.say("no path given: nothing saved", error=True)
                return
            path = Path(" ".join(words)).expanduser()
            export = None
            if options or path.suffix.lower() == ".onnx":
                export = (next((w for w in options if w in LAYOUTS), None),
                          next((w for w in options if w in DTYPES), None))
            if path.exists():
                self.push_screen(ConfirmScreen("Overwrite the file?", f"{path} exists.", "overwrite it"),
                                 lambda yes: write(path, export) if yes else self.say("nothing saved"))
            else:
                write(path, export)

        # Two short lines: the dialog is narrower than an 80-column terminal.
        self.ask("Save checkpoint or export",
                 "Checkpoint path (.safetensors); or export the weights:\n"
                 "name.onnx, or name.safetensors torch|stepper (+ float32)",
                 str(self.session.default_checkpoint_path()), chosen)

    def _export(self, path: Path, layout: str | None, dtype: str | None) -> None:
        """Write the current weights for another program (the session itself is unchanged)."""
        if self.busy():
            return
        last = self.session.last_checkpoint
        try:
            done = export_weights(self.session.setup, self.session.theta.copy(), path, layout, dtype,
                                  () if last is None else (last,), state=self.session.state.copy(),
                                  step=self.session.step_count)
        except StepperError as exc:
            self.say(exc.message, error=True)
            return
        what = "ONNX" if done.kind == "onnx" else f"{done.layout} layout"
        evaluation = "" if done.evaluation_cost is None else f", evaluation cost {done.evaluation_cost:.6g}"
        self.say(f"exported {path} ({what}, {done.dtype}): training cost at the weights written "
                 f"{done.written_cost:.6g}{evaluation}; the session itself is not saved")

    def action_load(self) -> None:
        if self.busy():
            return
        last = self.session.last_checkpoint
        proposal = str(last) if last is not None else str(self.session.session_folder()) + "/"

        def chosen(text: str) -> None:
            path = Path(text.strip()).expanduser()
            if self.apply(lambda: self.session.load_checkpoint(path)):
                self.say(self.session.last_action or f"loaded {path}")

        self.ask("Load checkpoint", "Path of the checkpoint to load (undo takes it back):", proposal, chosen)

    def action_help(self) -> None:
        self.push_screen(HelpScreen())

    async def action_quit(self) -> None:
        if self.job is not None:
            # Cancel it (stopping a custom layer's code that hangs) and quit when it has ended; every
            # step it made is in the journal already. If it does not end within QUIT_WAIT, quit anyway.
            if self._worker is not None:
                self._worker.cancel()
            user_code.abandon("quitting with q")
            self.say(f"quitting: cancelling {self.job} first")
            self._quit_after_job = True
            self.set_timer(QUIT_WAIT, self.exit)
            return
        if not self.session.dirty:
            self.exit()
            return

        def answered(choice: str | None) -> None:
            if choice == "quit":
                self.exit()
            elif choice == "save":
                self.save_then(self.exit)

        self.push_screen(QuitScreen(), answered)
