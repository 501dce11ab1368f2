"""Persistent state of chainvigil: the zarr draw store and the SQLite history.

Imports only zarr, numpy, sqlite-utils and the standard library.
"""

from storage.draws import DrawStore
from storage.history import History

__all__ = ["DrawStore", "History"]
