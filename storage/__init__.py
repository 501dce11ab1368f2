"""Persistent state of chainvigil: the zarr draw store and the SQLite history.

Imports only zarr, numpy, sqlite-utils and the standard library.
"""

from chainvigil.storage.draws import DrawStore
from chainvigil.storage.history import History

__all__ = ["DrawStore", "History"]
