"""The draw store when the disk fails: a write that raises (ENOSPC, EIO) leaves the chain as it was,
the same draws can be written again, and ``durable=True`` fsyncs every file a flush depends on.

Faults are injected into zarr's own file writes (``LocalStore.set``), so a failure can strike after
some chunk files of a block were written and before others, as a full disk does.
"""
from __future__ import annotations

import errno
import os
import random

import numpy as np
import pytest
import zarr.storage

import chainvigil.storage.draws as draws_module
from chainvigil.storage.draws import DrawStore


class DiskFaults:
    """Makes zarr file writes raise OSError while ``armed`` (each write fails with ``rate``)."""

    def __init__(self, monkeypatch, rate=1.0, seed=0, code=errno.ENOSPC):
        self.armed, self.rate, self.code = False, rate, code
        self.rng = random.Random(seed)
        self.failures = 0
        original = zarr.storage.LocalStore.set
        faults = self

        async def failing_set(store, key, value):
            if faults.armed and faults.rng.random() < faults.rate:
                faults.failures += 1
                raise OSError(faults.code, os.strerror(faults.code), key)
            return await original(store, key, value)

        monkeypatch.setattr(zarr.storage.LocalStore, "set", failing_set)


def blocks(rng, sizes, n=7, p=2):
    start = 1
    for k in sizes:
        yield rng.normal(size=(k, n)), rng.normal(size=(k, p)), np.arange(start, start + k)
        start += k


@pytest.mark.parametrize("code", [errno.ENOSPC, errno.EIO])
@pytest.mark.parametrize("seed", range(6))
def test_a_failed_append_changes_nothing_and_the_same_block_goes_in_later(tmp_path, monkeypatch, code, seed):
    faults = DiskFaults(monkeypatch, rate=0.05, seed=100 * code + seed, code=code)
    rng = np.random.default_rng(5)
    store = DrawStore(tmp_path / "s.zarr", chunk_draws=8, chunk_obs=3)
    expected = []
    for ll, pa, ids in blocks(rng, [5, 3, 11, 2, 17, 8, 1, 30, 4]):
        faults.armed = True
        for _ in range(200):  # the sampler's block is retried until the disk takes it
            before = (store.length("r", "c") if store.chains("r") else 0)
            try:
                store.append("r", "c", ll, pa, draw_ids=ids)
                break
            except OSError as err:
                assert err.errno == code
                assert (store.length("r", "c") if store.chains("r") else 0) == before
        else:
            pytest.fail("the block never went in")
        faults.armed = False
        expected.append((ll, pa, ids))
    assert faults.failures > 0
    faults.armed = True
    for _ in range(50):
        try:
            store.flush()
            break
        except OSError:
            pass
    faults.armed = False
    store.flush()
    want_ll = np.concatenate([b[0] for b in expected])
    for reopened in (store, DrawStore(tmp_path / "s.zarr", chunk_draws=8, chunk_obs=3)):
        np.testing.assert_array_equal(reopened.read_loglik("r", "c"), want_ll)
        np.testing.assert_array_equal(reopened.read_params("r", "c"), np.concatenate([b[1] for b in expected]))
        np.testing.assert_array_equal(reopened.read_draw_ids("r", "c"), np.arange(1, len(want_ll) + 1))


def test_a_full_chunk_buffer_survives_a_failed_write(tmp_path, monkeypatch):
    """The block that fills the current chunk fails to write; the buffered draws before it are kept
    (before the fix the next append wrote over the buffered chunk and those draws were lost)."""
    faults = DiskFaults(monkeypatch)
    rng = np.random.default_rng(6)
    store = DrawStore(tmp_path / "s.zarr", chunk_draws=8, chunk_obs=4)
    (a, pa_a, ia), (b, pa_b, ib), (c, pa_c, ic) = blocks(rng, [6, 2, 9])
    store.append("r", "c", a, pa_a, draw_ids=ia)
    faults.armed = True
    with pytest.raises(OSError):
        store.append("r", "c", b, pa_b, draw_ids=ib)  # completes the chunk: its write fails
    faults.armed = False
    assert store.length("r", "c") == 6
    store.append("r", "c", b, pa_b, draw_ids=ib)
    store.append("r", "c", c, pa_c, draw_ids=ic)
    store.flush()
    again = DrawStore(tmp_path / "s.zarr", chunk_draws=8, chunk_obs=4)
    np.testing.assert_array_equal(again.read_loglik("r", "c"), np.concatenate([a, b, c]))
    np.testing.assert_array_equal(again.read_draw_ids("r", "c"), np.arange(1, 18))


def test_truncate_after_a_failed_flush_cuts_the_arrays_to_the_committed_length(tmp_path, monkeypatch):
    faults = DiskFaults(monkeypatch)
    rng = np.random.default_rng(7)
    store = DrawStore(tmp_path / "s.zarr", chunk_draws=8, chunk_obs=4)
    (a, pa_a, ia), (b, pa_b, ib) = blocks(rng, [8, 3])
    store.append("r", "c", a, pa_a, draw_ids=ia)
    store.flush()
    store.append("r", "c", b, pa_b, draw_ids=ib)
    original_put = DrawStore._put

    def put_then_fail(self, st, rows, k):  # the resize went through, the chunk write does not
        faults.armed = True
        try:
            original_put(self, st, rows, k)
        finally:
            faults.armed = False

    monkeypatch.setattr(DrawStore, "_put", put_then_fail)
    monkeypatch.setattr(DrawStore, "_undo", lambda self, st, before: setattr(st, "durable", before[2])
                        or setattr(st, "base", before[0]) or setattr(st, "buffered", before[1]))
    with pytest.raises(OSError):
        store.flush()
    monkeypatch.setattr(DrawStore, "_put", original_put)
    store.truncate("r", "c", 8)  # the commit log says 8
    assert store.length("r", "c") == 8 and store.durable_length("r", "c") == 8
    again = DrawStore(tmp_path / "s.zarr", chunk_draws=8, chunk_obs=4)
    assert again.length("r", "c") == 8
    np.testing.assert_array_equal(again.read_loglik("r", "c"), a)


def test_durable_flush_fsyncs_every_file_and_folder_it_wrote(tmp_path, monkeypatch):
    synced = []
    original = draws_module.fsync_path
    monkeypatch.setattr(draws_module, "fsync_path", lambda p: synced.append(p) or original(p))
    path = tmp_path / "s.zarr"
    store = DrawStore(path, chunk_draws=8, chunk_obs=3, durable=True)
    rng = np.random.default_rng(8)
    for round_ in range(3):
        before = {p: p.stat().st_mtime_ns for p in path.rglob("*")}
        synced.clear()
        for ll, pa, ids in blocks(rng, [5, 13]):
            store.append("r", "c", ll, pa, draw_ids=ids + 100 * round_)
        store.flush("r", "c")
        written = {p for p in path.rglob("*") if p.is_file() and before.get(p) != p.stat().st_mtime_ns}
        assert written, round_
        assert written <= set(synced), sorted(written - set(synced))
        for p in written:  # every folder from the file up to the store root
            for folder in p.parents:
                if folder == path.parent:
                    break
                assert folder in synced, folder
    plain = DrawStore(tmp_path / "p.zarr", chunk_draws=8, durable=False)
    synced.clear()
    plain.append("r", "c", np.zeros((20, 2)))
    plain.flush()
    assert synced == []
