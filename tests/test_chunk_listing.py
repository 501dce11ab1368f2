"""Chunk folders of a long run: listed in full on a schedule, the next numbered chunks looked up in
between (chainvigil.ingest._new_npz_chunks, chainvigil.readers.next_chunks / FULL_LISTING_BATCH).

The schedule is shrunk (a full listing every ``taken // 4`` passes) so a few dozen chunks stand for
the tens of thousands of a days-long run.  Real chunk files written by the public writer, the real
service, store and history.  Checked: every draw is taken exactly once, full listings are rarer
than passes, and what only a full listing sees (a chunk rewritten after it was taken, a name out of
the numbered series, a FIFO in the folder) is still found, within the schedule's bound.
"""
from __future__ import annotations

import os

import numpy as np
import pytest

from chainvigil import ingest as ingest_module
from chainvigil import readers as readers_module
from chainvigil.readers import next_chunks
from chainvigil.service import Service
from chainvigil.writer import ChainWriter

N = 4
BATCH = 4


def draws(rng, k):
    y = np.linspace(-1, 1, N)
    mu = rng.normal(0, 0.4, size=(k, 1))
    return -0.5 * np.log(2 * np.pi) - 0.5 * (y - mu) ** 2, mu


@pytest.fixture
def small_batches(monkeypatch):
    monkeypatch.setattr(ingest_module, "FULL_LISTING_BATCH", BATCH)
    monkeypatch.setattr(readers_module, "FULL_LISTING_BATCH", BATCH)


@pytest.fixture
def listings(monkeypatch):
    """Counts the full listings of chunk folders (``pending_chunks``)."""
    calls = []
    original = ingest_module.pending_chunks

    def counted(folder, taken):
        calls.append(str(folder))
        return original(folder, taken)

    monkeypatch.setattr(ingest_module, "pending_chunks", counted)
    return calls


def test_next_chunks_follows_a_numbered_series(tmp_path):
    for name in ("00000007.npz", "00000008.npz", "00000010.npz", ".00000009.npz.tmp"):
        (tmp_path / name).write_bytes(b"x")
    os.mkfifo(tmp_path / "00000011.npz")
    assert next_chunks(tmp_path, "00000006.npz") == ["00000007.npz", "00000008.npz"]  # 9 is missing
    assert next_chunks(tmp_path, "00000009.npz") == ["00000010.npz"]  # a FIFO is not a chunk
    assert next_chunks(tmp_path, "00000007.npz", taken={"00000008.npz"}) == []
    assert next_chunks(tmp_path, "last.npz") is None  # not numbered: the caller lists the folder
    assert next_chunks(tmp_path, None) is None
    assert next_chunks(tmp_path, "99.npz") == []  # 100.npz would be another width


def test_a_long_chunk_folder_is_listed_on_a_schedule_and_every_draw_taken_once(tmp_path, small_batches,
                                                                                listings):
    rng = np.random.default_rng(1)
    run = tmp_path / "root" / "r"
    writer = ChainWriter(run, "c", param_names=("mu",))
    written = []
    for _ in range(40):
        written.append(draws(rng, 3))
        writer.append(*written[-1])
    svc = Service(tmp_path / "root", every=0.0)
    svc.cycle()
    listings.clear()
    passes = 60
    for _ in range(passes):
        written.append(draws(rng, 3))
        writer.append(*written[-1])
        svc.cycle()
    ll = np.concatenate([w[0] for w in written])
    np.testing.assert_array_equal(svc.store.read_loglik("r", "c"), ll)  # each once, in order
    assert svc.history.committed("r", "c")["draws"] == len(ll)
    # 40..100 taken chunks: a full listing every 10..25 passes, plus none between (the series explains
    # every change of the folder)
    assert 0 < len(listings) <= passes // 10 + 1, len(listings)
    svc.close()
    writer.close()


def test_what_only_a_full_listing_sees_is_found_within_the_schedule(tmp_path, small_batches, listings):
    rng = np.random.default_rng(2)
    root = tmp_path / "root"
    run = root / "r"
    writer = ChainWriter(run, "c", param_names=("mu",))
    first = [draws(rng, 3) for _ in range(32)]
    for block in first:
        writer.append(*block)
    svc = Service(root, every=0.0)
    svc.cycle()
    bound = 32 // BATCH + 1  # passes until the next full listing, at most

    # a chunk rewritten in place of one taken (atomic rename), while new chunks keep arriving
    scratch = tmp_path / "scratch"
    other = draws(rng, 3)
    with ChainWriter(scratch, "x", param_names=("mu",)) as w:
        w.append(*other)
    data = next((scratch / "x").glob("*.npz")).read_bytes()
    target = run / "c" / "00000005.npz"
    tmp = run / "c" / ".rewrite.tmp"
    tmp.write_bytes(data)
    os.replace(tmp, target)
    for k in range(bound + 1):
        writer.append(*draws(rng, 3))
        svc.cycle()
        if any(e["kind"] == "rewritten" for e in svc.history.events()):
            break
    found = [e for e in svc.history.events() if e["kind"] == "rewritten" and "00000005.npz" in (e["file"] or "")]
    assert found, "the rewritten chunk was not noticed within the schedule"
    assert k < bound + 1
    # its new content was read as a new segment of the chain; the old draws stay
    np.testing.assert_array_equal(svc.store.read_loglik("r", "c")[:96], np.concatenate([b[0] for b in first]))
    assert "c~2" in svc.store.chains("r")

    # a FIFO dropped into the (large) chunk folder is reported within the schedule too
    os.mkfifo(run / "c" / "odd.npz")
    for k in range(2 * bound + 2):
        svc.cycle()
        if any("odd.npz" in (e["file"] or "") for e in svc.history.events()):
            break
    assert any("odd.npz" in (e["file"] or "") and e["kind"] == "not_regular" for e in svc.history.events())
    svc.close()
    writer.close()
