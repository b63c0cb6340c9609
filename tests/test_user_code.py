"""User code can neither end Stepper nor hang it (our own contract; no outside reference applies).

A custom layer's exit, interrupt or exception is that layer's failure; a call
that never returns is stopped by the cancel key (another thread) or by the
app's time limit on the screen's thread.
"""

from __future__ import annotations

import threading
import time

import pytest

from stepper.formats import user_code


def spin() -> None:
    while True:
        pass


def stubborn() -> None:
    # Swallows the first stop and loops on: the watchdog sends it again.
    try:
        spin()
    except user_code.Abandoned:
        pass
    spin()


@pytest.mark.parametrize("body", [spin, stubborn])
def test_abandon_stops_a_call_that_never_returns_in_another_thread(body) -> None:  # type: ignore[no-untyped-def]
    caught: list[BaseException] = []

    def worker() -> None:
        try:
            user_code.call(body)
        except user_code.UserCodeFailure as failure:
            caught.append(failure)

    thread = threading.Thread(target=worker, daemon=True)
    thread.start()
    while not user_code.running():
        time.sleep(0.01)
    assert user_code.abandon("cancelled with x") == 1
    thread.join(timeout=5)
    assert not thread.is_alive()
    assert isinstance(caught[0].error, user_code.Abandoned) and caught[0].reason == "cancelled with x"
    assert user_code.running() == 0


def test_a_call_on_the_main_thread_is_abandoned_past_the_limit() -> None:
    start = time.monotonic()
    with user_code.limit_main_thread(0.3), pytest.raises(user_code.UserCodeFailure) as info:
        user_code.call(spin)
    assert isinstance(info.value.error, user_code.Abandoned)
    assert info.value.reason == "did not return within 0.3 s"
    assert time.monotonic() - start < 5


@pytest.mark.parametrize("exc", [SystemExit(0), KeyboardInterrupt(), GeneratorExit(), ValueError("x")])
def test_anything_raised_is_the_users_failure(exc: BaseException) -> None:
    def raise_it() -> None:
        raise exc

    with pytest.raises(user_code.UserCodeFailure) as info:
        user_code.call(raise_it)
    assert info.value.error is exc


def test_a_call_that_returns_is_untouched_by_a_late_stop() -> None:
    assert user_code.call(lambda: 42) == 42
    assert user_code.abandon() == 0  # nothing runs: nothing to stop, and nothing pending afterwards
    time.sleep(0.05)
    assert user_code.call(lambda: "still fine") == "still fine"
