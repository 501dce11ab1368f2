"""`chainvigil events` prints text from input escaped (no terminal control reaches the screen)."""
from chainvigil.cli import main
from chainvigil.storage.history import HistoryWriter


def test_events_text_output_escapes_control_characters(tmp_path, capsys):
    history = HistoryWriter(tmp_path / "history.sqlite")
    history.add_event("warning", "bad_name", "evil\x1b[31mred\nFAKE LINE: the run name contains control characters",
                      run="evil\x1b[2J", file=str(tmp_path / "evil"))
    history.close()
    assert main(["events", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "\x1b" not in out and out.count("\n") == 1  # one event, one line
    assert "evil\\x1b[31mred\\nFAKE LINE" in out and "[evil\\x1b[2J]" in out
