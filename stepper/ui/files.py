"""Keys of files and of the app itself: save and load checkpoints, help, quit."""

from __future__ import annotations

from pathlib import Path
from typing import Callable

from stepper.ui.base import AppBase
from stepper.ui.dialogs import ConfirmScreen, HelpScreen, QuitScreen


class FileKeys(AppBase):
    """Checkpoints (through the session), the help screen and quitting."""

    def action_save(self) -> None:
        self.save_then(None)

    def save_then(self, after: Callable[[], None] | None) -> None:
        """Ask for a path and save a checkpoint there; then run ``after`` if the save worked."""
        if self.busy():
            return

        def write(path: Path) -> None:
            if self.apply(lambda: self.session.save_checkpoint(path)):
                self.say(f"saved {path}")
                if after is not None:
                    after()

        def chosen(text: str) -> None:
            if not text.strip():
                self.say("no path given: nothing saved", error=True)
                return
            path = Path(text.strip()).expanduser()
            if path.exists():
                self.push_screen(ConfirmScreen(f"{path} exists. Overwrite it? (y: yes, any other key: no)"),
                                 lambda yes: write(path) if yes else self.say("nothing saved"))
            else:
                write(path)

        self.ask("Save checkpoint", "Path of the checkpoint (.safetensors):",
                 str(self.session.default_checkpoint_path()), chosen)

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
            self.say(f"{self.job} is running: x cancels it, then q quits", error=True)
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
