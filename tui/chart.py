"""A Textual widget that shows a ``chainvigil.tui.canvas.Figure``, redrawn to fit whatever size it is given."""

from __future__ import annotations

from rich.text import Text
from textual.widget import Widget

from .canvas import Figure, draw


class Chart(Widget):
    """Holds a Figure; ``show(fig)`` swaps it in place (no remount), ``render`` draws at the current size."""

    DEFAULT_CSS = """
    Chart { width: 1fr; height: 1fr; min-height: 6; }
    """

    def __init__(self, title: str = "", *, id: str | None = None, classes: str | None = None):
        super().__init__(id=id, classes=classes)
        self.title = title
        self.figure = Figure(message="waiting for data", title=title)
        self.last_text: Text = Text()

    def show(self, figure: Figure) -> None:
        if not figure.title:
            figure.title = self.title
        self.figure = figure
        self.refresh()

    def render(self) -> Text:
        size = self.content_size
        self.last_text = draw(self.figure, size.width, size.height)
        return self.last_text

    @property
    def plain(self) -> str:
        """Text of the chart as last drawn (what is on screen)."""
        return self.last_text.plain
