"""A panel whose whole content is one block of styled text made from the current view."""
from __future__ import annotations

from rich.text import Text
from textual.widgets import Static


class TextPanel(Static):
    """Subclasses say how to write the view as text; ``show_view`` replaces the text in place."""

    def make_text(self, view) -> Text:
        raise NotImplementedError

    def show_view(self, view) -> None:
        self.text = self.make_text(view)
        self.update(self.text)

    @property
    def plain(self) -> str:
        return getattr(self, "text", Text()).plain
