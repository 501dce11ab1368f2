"""Watching the root for new draws (docs/architecture.md).

:class:`FolderWatcher` turns file-system events into calls ``on_change({run names})``, made from one
thread after a burst of events quietens (``debounce`` seconds without events), but at least every
``max_delay`` seconds while events keep coming, so a busy run is never starved.

The root itself is watched without recursion and each run folder recursively, so the state folder and
anything else left out (hidden entries, paths in ``ignore``) is never watched at all: the draw store's
own writes cause no events. A new run folder is watched as soon as it appears, and its creation is itself
reported, so a reader scanning the folder after the callback misses nothing written before the watch
began. Hidden files (temporary names before an atomic rename) and the stop signal are ignored; a rename
onto a visible name counts. Reads (open / close without writing) do not count, so the service reading a
file does not wake itself.

``poll=True`` uses watchdog's polling observer, for network file systems where inotify sees nothing.
"""

from __future__ import annotations

import logging
import os
import threading
import time
from typing import Callable, Iterable

from watchdog.events import (EVENT_TYPE_CLOSED, EVENT_TYPE_CREATED, EVENT_TYPE_DELETED,
                             EVENT_TYPE_MODIFIED, EVENT_TYPE_MOVED, FileSystemEvent,
                             FileSystemEventHandler)
from watchdog.observers import Observer
from watchdog.observers.polling import PollingObserver

from chainvigil.rules import SIGNAL_FILE as STOP_SIGNAL_NAME, run_of_path

__all__ = ["FolderWatcher"]

log = logging.getLogger(__name__)

_COUNTED = {EVENT_TYPE_CREATED, EVENT_TYPE_MODIFIED, EVENT_TYPE_MOVED, EVENT_TYPE_DELETED, EVENT_TYPE_CLOSED}


class _Handler(FileSystemEventHandler):
    def __init__(self, watcher: "FolderWatcher"):
        self.watcher = watcher

    def on_any_event(self, event: FileSystemEvent) -> None:
        self.watcher._event(event)


class FolderWatcher:
    """Call ``on_change(set_of_run_names)`` when files in run folders under ``root`` change.

    Parameters
    ----------
    root : path-like
        The watched root (one folder per run).
    on_change : callable
        Called with a non-empty set of run names, always from the same thread, never concurrently.
        Exceptions are logged and kept in :attr:`errors`; the watcher goes on.
    poll : bool
        Use the polling observer (network file systems) instead of the native one (inotify).
    debounce : float
        Seconds without events before the collected changes are delivered.
    max_delay : float
        Longest wait, in seconds, between the first event of a burst and its delivery.
    ignore : iterable of path-like
        Folders never watched (the state folder when it is inside the root under a visible name).
    poll_interval : float
        Seconds between scans of the polling observer.
    """

    def __init__(self, root: str | os.PathLike, on_change: Callable[[set[str]], None], *,
                 poll: bool = False, debounce: float = 0.25, max_delay: float = 1.0,
                 ignore: Iterable[str | os.PathLike] = (), poll_interval: float = 0.5):
        if debounce < 0 or max_delay < debounce:
            raise ValueError(f"need 0 <= debounce <= max_delay, got {debounce} and {max_delay}")
        self.root = os.path.abspath(os.fspath(root))
        self.on_change = on_change
        self.poll = poll
        self.debounce = float(debounce)
        self.max_delay = float(max_delay)
        self.poll_interval = float(poll_interval)
        self.ignore = tuple(os.path.abspath(os.fspath(p)) for p in ignore)
        self._ignore_real = tuple(os.path.realpath(p) for p in self.ignore)
        self.errors: list[BaseException] = []
        self._cond = threading.Condition()
        self._pending: set[str] = set()
        self._first: float | None = None
        self._last: float | None = None
        self._to_watch: set[str] = set()
        self._to_unwatch: set[str] = set()
        self._watches: dict = {}
        self._stopping = False
        self._observer = None
        self._thread: threading.Thread | None = None
        self._handler = _Handler(self)

    # ---------------------------------------------------------------------------------------------

    def start(self) -> "FolderWatcher":
        """Start watching (the root must exist)."""
        if self._thread is not None:
            raise RuntimeError("the watcher is already started")
        if not os.path.isdir(self.root):
            raise FileNotFoundError(f"the watched root {self.root} is not a folder")
        self._observer = PollingObserver(timeout=self.poll_interval) if self.poll else Observer()
        self._observer.schedule(self._handler, self.root, recursive=False)
        for entry in os.scandir(self.root):
            if self._is_run_folder(entry.path):
                self._watch(entry.name)
        self._observer.start()
        self._thread = threading.Thread(target=self._dispatch, name="chainvigil-watcher", daemon=True)
        self._thread.start()
        return self

    def stop(self, timeout: float = 10.0) -> None:
        """Stop watching and join the threads; changes not yet delivered are dropped."""
        with self._cond:
            self._stopping = True
            self._cond.notify_all()
        if self._observer is not None:
            self._observer.stop()
            self._observer.join(timeout)
        if self._thread is not None and self._thread is not threading.current_thread():
            self._thread.join(timeout)

    def __enter__(self) -> "FolderWatcher":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    @property
    def watched_runs(self) -> list[str]:
        """Run folders currently watched."""
        return sorted(list(self._watches))

    def request(self, runs: Iterable[str]) -> None:
        """Queue runs for delivery as if their files had changed (e.g. to retry a half-written file)."""
        runs = set(runs)
        if runs:
            self._add(runs)

    # ---------------------------------------------------------------------------------------------

    def _is_ignored(self, path: str) -> bool:
        for p in self.ignore + self._ignore_real:
            if path == p or path.startswith(p + os.sep):
                return True
        return False

    def _is_run_folder(self, path: str) -> bool:
        name = os.path.basename(path)
        return (not name.startswith(".") and not self._is_ignored(path)
                and not self._is_ignored(os.path.realpath(path)) and os.path.isdir(path))

    def _run_of(self, path: str, is_directory: bool) -> str | None:
        """The run a path belongs to, or None when the path does not count."""
        run = run_of_path(path, self.root)
        if run is None:
            return None
        parts = os.path.relpath(path, self.root).split(os.sep)
        if parts[0].startswith(".") or parts[-1].startswith(".") or self._is_ignored(path):
            return None
        if len(parts) == 1 and not is_directory:
            return None                                    # a file directly in the root
        if len(parts) == 2 and parts[1] == STOP_SIGNAL_NAME:
            return None                                    # written by the service itself
        return parts[0]

    def _event(self, event: FileSystemEvent) -> None:
        if event.event_type not in _COUNTED:
            return
        if event.is_directory and event.event_type in (EVENT_TYPE_MODIFIED, EVENT_TYPE_CLOSED):
            return                                         # each child change has its own event
        paths = [os.fsdecode(event.src_path)]
        if event.event_type == EVENT_TYPE_MOVED:
            paths.append(os.fsdecode(event.dest_path))
        runs = set()
        for i, path in enumerate(paths):
            run = self._run_of(path, event.is_directory)
            if run is None:
                continue
            runs.add(run)
            if event.is_directory and os.path.dirname(path) == self.root:
                gone = event.event_type == EVENT_TYPE_DELETED or (event.event_type == EVENT_TYPE_MOVED and i == 0)
                with self._cond:
                    (self._to_unwatch if gone else self._to_watch).add(run)
        if runs:
            self._add(runs)

    def _add(self, runs: set[str]) -> None:
        now = time.monotonic()
        with self._cond:
            self._pending |= runs
            if self._first is None:
                self._first = now
            self._last = now
            self._cond.notify_all()

    def _watch(self, run: str) -> None:
        if run in self._watches or self._observer is None:
            return
        path = os.path.join(self.root, run)
        if not self._is_run_folder(path):
            return
        try:
            self._watches[run] = self._observer.schedule(self._handler, path, recursive=True)
        except OSError as exc:                             # vanished again, or out of inotify watches
            log.warning("cannot watch %s: %s", path, exc)

    def _unwatch(self, run: str) -> None:
        watch = self._watches.pop(run, None)
        if watch is not None and self._observer is not None:
            try:
                self._observer.unschedule(watch)
            except (KeyError, OSError):
                pass

    def _update_watches(self) -> None:
        with self._cond:
            add, drop = self._to_watch, self._to_unwatch
            self._to_watch, self._to_unwatch = set(), set()
        for run in drop:
            self._unwatch(run)
        for run in add:
            self._watch(run)

    def _dispatch(self) -> None:
        while True:
            with self._cond:
                while not self._pending and not self._to_watch and not self._to_unwatch and not self._stopping:
                    self._cond.wait()
                if self._stopping:
                    return
            self._update_watches()                         # before delivery: nothing falls in between
            with self._cond:
                while self._pending and not self._stopping:
                    now = time.monotonic()
                    due = min(self._last + self.debounce, self._first + self.max_delay)
                    if now >= due:
                        break
                    self._cond.wait(due - now)
                if self._stopping:
                    return
                batch = self._pending
                self._pending = set()
                self._first = self._last = None
            self._update_watches()
            if not batch:
                continue
            try:
                self.on_change(batch)
            except Exception as exc:                        # the watcher must survive the callback
                log.exception("on_change(%s) failed", sorted(batch))
                self.errors.append(exc)
