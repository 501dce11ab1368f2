"""The chainvigil viewer: a Textual app that reads the SQLite history only.

``run_viewer(history_path, *, live=True, refresh=1.0)`` opens it and blocks until the user quits;
``VigilApp(history_path, refresh=1.0, live=True)`` is the app itself (for embedding and tests).
"""

from .app import VigilApp, run_viewer

__all__ = ["VigilApp", "run_viewer"]
