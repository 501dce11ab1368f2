"""The screen on a history the service wrote while refits ran: exact / pending / PSIS marks in the
Observations view and "n exact, m pending" in the headline (Textual's pilot, the real service)."""
from __future__ import annotations

import asyncio

import numpy as np
import pytest

from chainvigil.refits import read_refit_request
from chainvigil.service import Service
from chainvigil.storage.history import History
from chainvigil.tui.app import VigilApp
from chainvigil.tui.headline import Headline
from chainvigil.tui.khat_chart import KhatPanel
from chainvigil.tui.run_list import RunList
from tests.test_service_refits import data_with_outlier, make_run, refit_in_blocks
from tests.test_tui import pick, until

pytestmark = [pytest.mark.timeout(180), pytest.mark.slow]  # a real service history with refits, then the app


def test_observations_view_marks_exact_pending_and_psis(tmp_path):
    root = tmp_path / "root"
    root.mkdir()
    y = data_with_outlier()
    y[11] = -12.5  # a second far reading: two exact refits asked for, one done
    rng = np.random.default_rng(22)
    service = Service(root, every=0.0)
    make_run(root, y, rng, draws=250)
    service.cycle()
    req = read_refit_request(root / "normal")
    assert req["method"] == "exact" and [r["held_out"] for r in req["refits"]] == [[4], [12]]
    refit_in_blocks(service, root / "normal--refit-4", y, [3], rng)
    service.close()
    path = service.state_dir / "history.sqlite"
    with History(path, readonly=True) as h:
        snap = h.latest_snapshot("normal")
        pw = h.pointwise("normal")
    assert (snap["loo_method"], snap["loo_exact"], snap["loo_pending"]) == ("mixed", 1, 1)
    assert pw[3]["loo_source"] == "exact" and pw[11]["loo_source"] == "pending"

    async def main():
        app = VigilApp(path, refresh=0.1)
        async with app.run_test(size=(120, 40)) as pilot:
            await until(pilot, lambda: app.view is not None and app.view.snap is not None)
            await pick(app, pilot, "normal")
            await pilot.pause(0.2)
            headline = app.query_one(Headline).text.plain
            table = app.query_one(RunList)
            data_cells = {name: str(table.get_row(name)[-1]) for name in ("normal", "normal--refit-4")}
            await pilot.press("3")
            await pilot.pause(0.3)
            panel = app.query_one(KhatPanel)
            return headline, panel.worst.plain, [p["obs"] for p in panel.worst_rows], data_cells

    headline, side, worst, data_cells = asyncio.run(main())
    assert data_cells == {"normal": "normals", "normal--refit-4": "↳ refit of normal"}
    lines = side.split("\n")
    row = {obs: lines[1 + i] for i, obs in enumerate(worst)}
    assert "◆ exact" in row[3] and "pending" not in row[3]
    assert "◌ pending" in row[11] and "exact" not in row[11]
    others = [row[o] for o in worst if o not in (3, 11)]
    assert others and not any("◆" in r or "◌" in r for r in others)  # PSIS: no mark
    assert "elpd: 1 exact, 1 pending, 18 PSIS" in side  # disjoint counts, adding up to n
    loo_line = next(line for line in headline.split("\n") if line.startswith("LOO"))
    assert "mixed · 1 exact, 1 pending" in loo_line
