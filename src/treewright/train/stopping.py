"""Stopping a run cleanly: Ctrl-C asks for a stop at the next step boundary, after a
checkpoint; a second Ctrl-C interrupts at once."""

from __future__ import annotations

import signal
import threading
from typing import TextIO


class StopRequest:
    """`requested` turns True on Ctrl-C (or on `request()`, which workers started by a
    launcher hear through the worker group). Use as a context manager around the run: the
    previous SIGINT handler is restored after it. Off the main thread, where signals cannot be
    caught, only `request()` sets it."""

    def __init__(self, stream: TextIO):
        self.stream = stream
        self.requested = False
        self.previous = None

    def request(self) -> None:
        self.requested = True

    def __enter__(self) -> "StopRequest":
        if threading.current_thread() is threading.main_thread():
            self.previous = signal.signal(signal.SIGINT, self._on_sigint)
        return self

    def __exit__(self, *exc_info: object) -> None:
        if self.previous is not None:
            signal.signal(signal.SIGINT, self.previous)
            self.previous = None

    def _on_sigint(self, signum, frame) -> None:
        if self.requested:
            raise KeyboardInterrupt
        self.request()
        self.stream.write("\ninterrupt: stopping after this step with a checkpoint "
                          "(Ctrl-C again to stop at once)\n")
        self.stream.flush()
