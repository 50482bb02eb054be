"""Signals that ask planrunner to stop: Ctrl-C (SIGINT), SIGTERM and SIGHUP.

Ctrl-C raises KeyboardInterrupt. `stopping_on_termination` makes SIGTERM and SIGHUP raise
`Terminated`, a KeyboardInterrupt, so that every cleanup runs for them as for Ctrl-C: the executors
stop their workers, a run removes its staging folder. `holding_interrupts` makes all three wait
while the few steps that must happen together run (a run folder put in place and logged in the
history), then delivers them as they would have been delivered.
"""

from __future__ import annotations

import contextlib
import signal
import threading
from collections.abc import Iterator

from planrunner.errors import Terminated

# asked to stop by the system or a closed terminal; their default action ends the process at once,
# without any cleanup, and leaves worker processes computing
TERMINATING_SIGNALS = tuple(getattr(signal, name) for name in ("SIGTERM", "SIGHUP") if hasattr(signal, name))


def _in_main_thread() -> bool:
    """Python runs signal handlers in the main thread only, and only it may install them."""
    return threading.current_thread() is threading.main_thread()


@contextlib.contextmanager
def stopping_on_termination() -> Iterator[None]:
    """While the body runs, SIGTERM and SIGHUP raise `Terminated` as Ctrl-C raises KeyboardInterrupt.

    Only in the main thread, and only over the default action: a program that embeds planrunner
    and handles these signals itself keeps its handlers. A repeated signal while the cleanups run is
    ignored, so that it cannot cut a cleanup short.
    """
    if not _in_main_thread():
        yield
        return
    replaced = [s for s in TERMINATING_SIGNALS if signal.getsignal(s) is signal.SIG_DFL]
    raised: list[int] = []

    def stop(number: int, frame: object) -> None:
        if not raised:
            raised.append(number)
            raise Terminated(number, signal.Signals(number).name)

    for number in replaced:
        signal.signal(number, stop)
    try:
        yield
    finally:
        for number in replaced:
            signal.signal(number, signal.SIG_DFL)


@contextlib.contextmanager
def holding_interrupts() -> Iterator[None]:
    """Ctrl-C, SIGTERM and SIGHUP that arrive while the body runs wait until it is done; the first
    is then delivered to the handler that was in place before (raising KeyboardInterrupt or
    `Terminated`, or the default action), as if it had arrived at that moment.

    For a few quick steps only (they cannot be interrupted): outside the main thread, where no
    signal handler runs, nothing needs holding.
    """
    if not _in_main_thread():
        yield
        return
    held: list[int] = []

    def hold(number: int, frame: object) -> None:
        held.append(number)

    previous = {}
    for number in (signal.SIGINT, *TERMINATING_SIGNALS):
        handler = signal.getsignal(number)
        if handler is not None:  # None: a handler installed outside Python, left alone
            previous[number] = handler
            signal.signal(number, hold)
    try:
        yield
    finally:
        for number, handler in previous.items():
            signal.signal(number, handler)
        if held:
            signal.raise_signal(held[0])
