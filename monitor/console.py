"""What ``chainvigil watch`` and ``chainvigil demo`` share about the terminal: the live screen beside a
running service, and line printing that ends quietly when the reader of stdout goes away.

Kept apart from ``chainvigil.cli`` and ``chainvigil.demo`` so that neither imports the other.
"""
from __future__ import annotations

import os
import sys
import threading


def silence_stdout() -> None:
    """Point stdout at /dev/null, so the interpreter's last flush does not fail on a closed pipe too."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):
        pass


def line_printer(on_closed=None):
    """A ``report(line)`` callback for the service: prints and flushes each line; when stdout is a
    closed pipe (e.g. ``| head``) it silences stdout and calls ``on_closed()`` once (e.g. to stop the
    service) instead of raising."""
    closed = []

    def report(line: str) -> None:
        if closed:
            return
        try:
            print(line, flush=True)
        except BrokenPipeError:
            closed.append(True)
            silence_stdout()
            if on_closed is not None:
                on_closed()
    return report


def run_with_screen(service, seconds=None) -> None:
    """The service in a background thread, the screen in this one (it reads the same history)."""
    from chainvigil.service import HISTORY_FILE
    from chainvigil.tui import run_viewer

    worker = threading.Thread(target=service.run, kwargs={"duration": seconds}, daemon=True,
                              name="chainvigil-service")
    worker.start()
    try:
        run_viewer(service.state_dir / HISTORY_FILE, live=True)
    finally:
        service.stop()
        worker.join(timeout=60)
