"""Long work in thread workers: N steps and the numeric slopes, with progress, cancel and an end report.

A worker drives one of the session's progress generators, checks for
cancellation between items and pushes progress back with ``call_from_thread``.
While one runs, every other operation on the session is refused (see
:meth:`~stepper.ui.base.AppBase.busy`); the table, the plot and the help stay
usable. The worker itself reports its end, so the session is never touched by
two threads at once.
"""

from __future__ import annotations

import time
from typing import Any, Callable, Generator

from textual import work
from textual.worker import Worker, get_current_worker

from stepper.errors import StepperError
from stepper.ui.base import AppBase, log
from stepper.ui.insight import InputChecks
from stepper.ui.panels import JobBar

#: Seconds between screen updates while a job runs (progress and, for steps, table and plot).
UPDATE_EVERY = 0.2


class Jobs(AppBase):
    """Start, drive and end the app's background jobs."""

    def start_steps(self, n: int) -> None:
        self._steps_at_start = self.session.step_count
        self._begin("steps", n)
        self._worker = self._steps_worker(n)

    def start_check(self, rest: bool = False) -> None:
        """Numeric slopes in a worker: the session's default cover, or with ``rest`` what the last check left out."""
        which = self.session.unchecked() if rest else self.session.default_check()
        self._begin("numeric slopes", self.session.net.n_params if which is None else int(which.size))
        self._worker = self._check_worker(which)

    def _begin(self, job: str, total: int) -> None:
        self.job = job
        self.query_one(JobBar).start(job, total)
        self._show_status()

    @work(thread=True, exclusive=True, group="session", exit_on_error=False)
    def _steps_worker(self, n: int) -> None:
        self._run_job("steps", self.session.iter_steps(n), redraw=True)

    @work(thread=True, exclusive=True, group="session", exit_on_error=False)
    def _check_worker(self, which: Any) -> None:
        self._run_job("numeric slopes", self.session.iter_refresh_check(which), redraw=False,
                      then=self._check_input_slopes)

    def _run_job(self, name: str, job: Generator[tuple[int, int], None, object], redraw: bool,
                 then: Callable[[Worker[None]], bool] | None = None) -> None:
        """Drive the session's ``job`` in the current worker thread, then ``then``, and report the end.

        ``job`` yields ``(done, total)``; the worker's cancellation is checked
        before each item, progress goes to the screen at most every
        UPDATE_EVERY seconds (with the table and plot too when ``redraw``).
        ``then`` runs after a job that was not cancelled and returns whether it
        was cancelled itself. A StepperError ends the job and is reported.
        """
        worker = get_current_worker()
        error: StepperError | None = None
        cancelled = False
        start = last = time.monotonic()
        try:
            for done, total in job:
                if worker.is_cancelled:
                    cancelled = True
                    break
                now = time.monotonic()
                if now - last >= UPDATE_EVERY:
                    last = now
                    self._from_worker(self._job_progress, done, total, redraw)
            if not cancelled and then is not None:
                cancelled = then(worker)
        except StepperError as exc:
            error = exc
        finally:
            job.close()
        self._from_worker(self._job_done, name, error, cancelled, time.monotonic() - start)

    def _check_input_slopes(self, worker: Worker[None]) -> bool:
        """As `stepper check` does: the custom layers' dX against numeric input slopes; True if cancelled."""
        if not self.figures.custom:
            return False
        version = self.session.version
        checks = self.figures.input_slopes(self.session.theta.copy(), lambda: worker.is_cancelled,
                                           self.session.training_net())
        if checks is None:
            return True
        self._from_worker(self._input_checks_done, InputChecks(version, checks))
        return False

    def _from_worker(self, callback: Callable[..., None], *args: Any) -> None:
        """``call_from_thread`` that gives up quietly when the app has already closed."""
        try:
            self.call_from_thread(callback, *args)
        except RuntimeError:
            log.info("app closed before a job update could be shown")

    def _job_progress(self, done: int, total: int, redraw: bool) -> None:
        self.query_one(JobBar).advance(done, total)
        if redraw:
            # The worker waits in call_from_thread until this returns: the session is still.
            self._worker_waiting = True
            try:
                self.session.flush_journal()  # a kill after this frame loses no step it shows
                self.refresh_view()
            finally:
                self._worker_waiting = False

    def _job_done(self, job: str, error: StepperError | None, cancelled: bool, seconds: float) -> None:
        self.job = None
        self._worker = None
        if self._quit_after_job:  # q was pressed while it ran
            self.exit()
            return
        self.query_one(JobBar).stop()
        if job == "numeric slopes" and error is None and not cancelled:
            self.numeric_pass_took(seconds)
        self.refresh_view()
        if error is not None:
            log.info("%s stopped: %s", job, error.message)
            self.refused(error, kept=job == "steps" and self.session.step_count > self._steps_at_start)
        elif cancelled:
            self.say(f"{job} cancelled" + (f"; kept: {self.session.last_action}" if job == "steps" else ""))
        elif job == "steps":
            self.after_steps()
