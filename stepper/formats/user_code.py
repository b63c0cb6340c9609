"""Calling a user's code so that it can neither end Stepper nor hang it.

Every call into a custom layer's code goes through :func:`call`, which

- turns anything the code raises, including ``SystemExit`` (``sys.exit(0)``
  must never end a check with exit code 0), ``KeyboardInterrupt`` and
  ``GeneratorExit``, into a :class:`UserCodeFailure` that the layer reports
  as its own failure, with the lines of the user's file it went through;
- can be abandoned: :func:`abandon` (the app's cancel key) raises
  :class:`Abandoned` inside calls that are running in other threads, and a
  call on the main thread that runs past the limit set with
  :func:`limit_main_thread` (the app sets one, so its screen never freezes)
  is abandoned the same way by a watchdog thread. The exception is raised
  asynchronously (``PyThreadState_SetAsyncExc``), so it stops Python code
  that loops for ever, and it is raised again every half second if the code
  catches it; it cannot stop a call blocked inside one system call (a sleep
  of a year). On the command line, Ctrl-C stops the user's code (a
  ``KeyboardInterrupt`` raised in it is its failure).
"""

from __future__ import annotations

import ctypes
import threading
import time
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, Callable, Iterator

#: Seconds between two attempts to stop an abandoned call that caught the exception.
RETRY_SECONDS = 0.5
_WATCH_SECONDS = 0.1


class Abandoned(BaseException):
    """Raised inside a user's code that Stepper stopped waiting for (a BaseException, like Ctrl-C)."""


class UserCodeFailure(Exception):
    """The user's code raised, exited, was interrupted or was abandoned.

    Attributes:
        error: what was raised inside the user's code.
        reason: for an abandoned call, why (``"cancelled"``, ``"did not return within 10 s"``).
    """

    def __init__(self, error: BaseException, reason: str | None = None) -> None:
        super().__init__(str(error))
        self.error = error
        self.reason = reason


@dataclass
class _Call:
    thread: int
    started: float
    reason: str | None = None
    injected_at: float = 0.0
    injected: bool = False


_lock = threading.Lock()
_active: dict[int, _Call] = {}
_main_limit: float | None = None
_watchdog: threading.Thread | None = None


def call(fn: Callable[..., Any], *args: Any) -> Any:
    """``fn(*args)``, the user's code; raises :class:`UserCodeFailure` for anything it raises."""
    record = _enter()
    try:
        try:
            return fn(*args)
        finally:
            _leave(record)
    except Abandoned as exc:
        raise UserCodeFailure(exc, record.reason or "abandoned") from None
    except BaseException as exc:  # the user's code: exit, Ctrl-C, anything
        raise UserCodeFailure(exc) from None


def abandon(reason: str = "cancelled", include_main: bool = False) -> int:
    """Stop every user call running in another thread (and the main one when asked); how many."""
    main = threading.main_thread().ident
    count = 0
    with _lock:
        for record in _active.values():
            if record.thread == main and not include_main:
                continue
            if record.reason is None:
                record.reason = reason
            _inject(record)
            count += 1
    if count:
        _ensure_watchdog()
    return count


def running() -> int:
    """How many calls into user code are running now."""
    with _lock:
        return len(_active)


@contextmanager
def limit_main_thread(seconds: float) -> Iterator[None]:
    """While inside, a user call on the main thread is abandoned after ``seconds``."""
    global _main_limit
    previous = _main_limit
    _main_limit = seconds
    _ensure_watchdog()
    try:
        yield
    finally:
        _main_limit = previous


# -- machinery ---------------------------------------------------------------------------------


def _enter() -> _Call:
    record = _Call(threading.get_ident(), time.monotonic())
    with _lock:
        _active[record.thread] = record
    return record


def _leave(record: _Call) -> None:
    """Unregister; a stop that was sent but not yet delivered is withdrawn (it is too late for it)."""
    while True:
        try:
            with _lock:
                if _active.get(record.thread) is record:
                    del _active[record.thread]
                if record.injected:
                    _set_async_exc(record.thread, None)
            return
        except Abandoned:
            continue  # delivered just now, on the way out: the call had returned; try again


def _inject(record: _Call) -> None:
    """Raise Abandoned in the record's thread (called with the lock held)."""
    record.injected = True
    record.injected_at = time.monotonic()
    _set_async_exc(record.thread, Abandoned)


def _set_async_exc(thread: int, exc: type[BaseException] | None) -> None:
    ctypes.pythonapi.PyThreadState_SetAsyncExc(
        ctypes.c_ulong(thread), ctypes.py_object(exc) if exc is not None else ctypes.c_void_p(0))


def _ensure_watchdog() -> None:
    global _watchdog
    with _lock:
        if _watchdog is None or not _watchdog.is_alive():
            _watchdog = threading.Thread(target=_watch, name="stepper-user-code-watchdog", daemon=True)
            _watchdog.start()


def _watch() -> None:
    main = threading.main_thread().ident
    while True:
        time.sleep(_WATCH_SECONDS)
        now = time.monotonic()
        with _lock:
            for record in _active.values():
                limit = _main_limit
                if record.reason is None and record.thread == main and limit is not None \
                        and now - record.started > limit:
                    record.reason = f"did not return within {limit:g} s"
                    _inject(record)
                elif record.reason is not None and now - record.injected_at > RETRY_SECONDS:
                    _inject(record)
