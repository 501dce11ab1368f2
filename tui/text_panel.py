"""A panel whose whole content is one block of styled text made from the current view, written for the
width the panel has (so lines can be fitted and wrapped under their own column, not cut)."""
from __future__ import annotations

from rich.text import Text
from textual.widget import Widget


class TextPanel(Widget):
    """Subclasses say how to write the view as text at a width; ``show_view`` swaps the view in place."""

    DEFAULT_CSS = "TextPanel { height: auto; }"

    def __init__(self, *, id: str | None = None, classes: str | None = None):
        super().__init__(id=id, classes=classes)
        self.view = None
        self.text = Text()

    def make_text(self, view, width: int) -> Text:
        raise NotImplementedError

    def show_view(self, view) -> None:
        self.view = view
        self.text = self.make_text(view, self._width())
        self.refresh(layout=True)

    def _width(self) -> int:
        w = self.content_size.width
        return w if w > 0 else 78

    def render(self) -> Text:
        if self.view is not None:
            self.text = self.make_text(self.view, self._width())
        return self.text

    def get_content_height(self, container, viewport, width: int) -> int:
        if self.view is None:
            return 1
        self.text = self.make_text(self.view, width)
        return max(1, len(self.text.plain.split("\n")))

    @property
    def plain(self) -> str:
        return self.text.plain
