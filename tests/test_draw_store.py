"""The zarr draw store: appends, flushes, truncation, crash recovery and readers, on real stores."""

import os
import subprocess
import sys
import tempfile
import textwrap
from pathlib import Path

import numpy as np
import pytest
import zarr
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from chainvigil.storage.draws import DrawStore

N = 7  # observations in the small stores below (two column chunks of width 4 plus a partial)
REPO = Path(__file__).resolve().parents[1]


def _block(rng, draws, n=N, p=2):
    return rng.normal(size=(draws, n)) - 3.0, rng.normal(size=(draws, p))


# ---------------------------------------------------------------- round trips

@pytest.mark.slow
@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.integers(min_value=0, max_value=17), min_size=1, max_size=6),
       st.integers(min_value=2, max_value=9))
def test_read_equals_concatenation_of_appends(sizes, chunk):
    rng = np.random.default_rng(len(sizes) * 100 + chunk)
    with tempfile.TemporaryDirectory() as d:
        store = DrawStore(d, chunk_draws=chunk, chunk_obs=4)
        lls, pas = [], []
        for k in sizes:
            ll, pa = _block(rng, k)
            lls.append(ll)
            pas.append(pa)
            store.append("run", "c1", ll, pa)
            total = sum(b.shape[0] for b in lls)
            assert store.length("run", "c1") == total
            # only whole chunks reach zarr while appending
            assert store.durable_length("run", "c1") == (total // chunk) * chunk
        want_ll, want_pa = np.concatenate(lls), np.concatenate(pas)
        np.testing.assert_array_equal(store.read_loglik("run", "c1"), want_ll)
        np.testing.assert_array_equal(store.read_params("run", "c1"), want_pa)
        np.testing.assert_array_equal(store.read_all_loglik("run", 2, 6), want_ll[:, 2:6])
        total = want_ll.shape[0]
        for a, b in {(0, total // 2), (total // 3, total), (chunk - 1, chunk + 1), (5, 2)}:
            np.testing.assert_array_equal(
                store.read_loglik("run", "c1", obs=slice(1, 3), draws=slice(a, b)),
                want_ll[a:b, 1:3])
            np.testing.assert_array_equal(store.read_params("run", "c1", draws=slice(a, b)),
                                          want_pa[a:b])
        store.close()  # flushes
        again = DrawStore(d)
        assert again.durable_length("run", "c1") == want_ll.shape[0]
        np.testing.assert_array_equal(again.read_loglik("run", "c1"), want_ll)
        np.testing.assert_array_equal(again.read_params("run", "c1"), want_pa)


OPS = st.lists(st.one_of(
    st.tuples(st.just("append"), st.integers(min_value=1, max_value=13)),
    st.tuples(st.just("flush"), st.just(0)),
    st.tuples(st.just("crash"), st.just(0)),
    st.tuples(st.just("truncate"), st.floats(min_value=0.0, max_value=1.0)),
), min_size=1, max_size=12)


@pytest.mark.slow
@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(OPS)
def test_sequences_of_append_flush_crash_truncate_match_a_list_model(ops):
    """A list model: durable rows survive a reopen without flush, pending rows do not."""
    rng = np.random.default_rng(len(ops))
    with tempfile.TemporaryDirectory() as d:
        store = DrawStore(d, chunk_draws=5, chunk_obs=4)
        store.append("r", "a", np.empty((0, N)), np.empty((0, 2)))  # creates the empty chain
        rows, durable = np.empty((0, N)), 0
        for op, arg in ops:
            if op == "append":
                ll, pa = _block(rng, arg)
                store.append("r", "a", ll, pa)
                rows = np.concatenate([rows, ll])
                durable = max(durable, (rows.shape[0] // 5) * 5)
            elif op == "flush":
                store.flush("r", "a")
                durable = rows.shape[0]
            elif op == "crash":  # drop the object without flushing, as a killed process would
                store = DrawStore(d, chunk_draws=5, chunk_obs=4)
                rows = rows[:durable]
            else:
                cut = int(arg * durable)
                store.truncate("r", "a", cut)
                rows, durable = rows[:cut], cut
            assert store.length("r", "a") == rows.shape[0]
            assert store.durable_length("r", "a") == durable
            np.testing.assert_array_equal(store.read_loglik("r", "a"), rows)


def test_the_callers_arrays_may_change_after_append(tmp_path):
    store = DrawStore(tmp_path / "s", chunk_draws=8)
    a, b = np.arange(5 * 3.0).reshape(5, 3), np.arange(6 * 3.0).reshape(6, 3) + 100
    want = np.concatenate([a, b])
    store.append("r", "c", a)  # stays pending
    store.append("r", "c", b)  # fills one chunk; 3 rows of b stay pending
    a[:] = -1
    b[:] = -1
    store.flush()
    np.testing.assert_array_equal(DrawStore(tmp_path / "s").read_loglik("r", "c"), want)


def test_params_may_be_empty():
    rng = np.random.default_rng(1)
    with tempfile.TemporaryDirectory() as d:
        store = DrawStore(d, chunk_draws=4)
        ll, _ = _block(rng, 10)
        store.append("r", "a", ll)
        store.flush()
        assert store.read_params("r", "a").shape == (10, 0)
        assert DrawStore(d).read_params("r", "a").shape == (10, 0)


@pytest.mark.parametrize("codec", ["none", "lz4", "zstd"])
def test_every_codec_round_trips(tmp_path, codec):
    rng = np.random.default_rng(2)
    store = DrawStore(tmp_path / "s", chunk_draws=8, codec=codec)
    ll, pa = _block(rng, 21)
    store.append("r", "a", ll, pa)
    store.close()
    np.testing.assert_array_equal(DrawStore(tmp_path / "s").read_loglik("r", "a"), ll)


def test_chunk_files_on_disk_are_whole_chunks_until_flush(tmp_path):
    rng = np.random.default_rng(3)
    store = DrawStore(tmp_path / "s", chunk_draws=8, chunk_obs=4)
    for k in (3, 3, 3, 3, 5):  # 17 draws: two whole chunks written, 1 pending
        store.append("r", "a", *_block(rng, k))
    chunk_dir = tmp_path / "s" / "r" / "a" / "loglik" / "c"
    files = sorted(str(p.relative_to(chunk_dir)) for p in chunk_dir.rglob("*") if p.is_file())
    assert files == ["0/0", "0/1", "1/0", "1/1"]  # 2 draw chunks x 2 column chunks (n = 7)
    assert zarr.open_array(str(tmp_path / "s" / "r" / "a" / "loglik"), mode="r").shape == (16, N)
    store.flush()
    assert zarr.open_array(str(tmp_path / "s" / "r" / "a" / "loglik"), mode="r").shape == (17, N)


@pytest.mark.parametrize("n, widest, width", [(7, 4, 4), (9, 4, 3), (10_000, 4096, 3334),
                                               (3, 4096, 3)])
def test_columns_split_into_equal_chunks(tmp_path, n, widest, width):
    store = DrawStore(tmp_path / "s", chunk_draws=8, chunk_obs=widest)
    store.append("r", "a", np.zeros((1, n)))
    assert zarr.open_array(str(tmp_path / "s" / "r" / "a" / "loglik"), mode="r").chunks == (8, width)


# ---------------------------------------------------------------- multi-chain readers

def test_read_all_loglik_concatenates_chains_in_sorted_order_with_pending(tmp_path):
    rng = np.random.default_rng(4)
    store = DrawStore(tmp_path / "s", chunk_draws=8, chunk_obs=4)
    blocks = {}
    for chain, k in (("b", 11), ("a", 9), ("c", 3)):
        blocks[chain] = _block(rng, k)[0]
        store.append("r", chain, blocks[chain])
    assert store.chains("r") == ["a", "b", "c"]
    want = np.concatenate([blocks["a"], blocks["b"], blocks["c"]])
    np.testing.assert_array_equal(store.read_all_loglik("r", 0, N), want)
    np.testing.assert_array_equal(store.read_all_loglik("r", 3, 5), want[:, 3:5])
    np.testing.assert_array_equal(store.read_loglik("r", obs=[6, 0]), want[:, [6, 0]])
    assert store.read_all_loglik("r", 4, 4).shape == (23, 0)
    with pytest.raises(IndexError, match="observation block 2:8"):
        store.read_all_loglik("r", 2, 8)
    trimmed = store.read_run("r")
    assert trimmed.shape == (3, 3, N)
    np.testing.assert_array_equal(trimmed[1], blocks["b"][:3])
    ragged = store.read_run("r", ragged=True)
    assert [a.shape[0] for a in ragged] == [9, 11, 3]


def test_the_chain_list_follows_every_chain_created_or_dropped(tmp_path):
    # the store keeps each run's chain names between listings: a chain it creates or drops, an
    # unknown run that gets its first chain, and a half-created chain are listed as on disk
    rng = np.random.default_rng(4)
    store = DrawStore(tmp_path / "s", chunk_obs=4)
    assert store.chains("r") == []
    store.append("r", "b", *_block(rng, 3))
    assert store.chains("r") == ["b"]
    store.append("r", "a", *_block(rng, 2))
    listed = store.chains("r")
    listed.append("x")  # the caller's list is its own
    assert store.chains("r") == ["a", "b"]
    store.drop("r", "b")
    assert store.chains("r") == ["a"]
    store.append("r", "b", *_block(rng, 1))
    store.flush()
    zarr.open_group(str(tmp_path / "s"), mode="a")["r"].create_group("c")  # a kill before its arrays
    again = DrawStore(tmp_path / "s", chunk_obs=4)
    assert again.chains("r") == ["a", "b", "c"]
    again.append("r", "c", *_block(rng, 1))  # started afresh
    again.append("r", "d", *_block(rng, 1))
    assert again.chains("r") == ["a", "b", "c", "d"]
    assert sorted(zarr.open_group(str(tmp_path / "s"), mode="r")["r"].group_keys()) == ["a", "b", "c", "d"]


def test_unknown_run_or_chain(tmp_path):
    store = DrawStore(tmp_path / "s")
    assert store.chains("nothing") == []
    assert store.length("nothing", "a") == 0
    with pytest.raises(KeyError, match="'nothing'"):
        store.read_loglik("nothing", "a")
    store.truncate("nothing", "a", 0)  # nothing committed, nothing stored: fine
    with pytest.raises(ValueError, match="5 draws are committed"):
        store.truncate("nothing", "a", 5)


# ---------------------------------------------------------------- bad input

@pytest.mark.parametrize("bad", ["", ".", "..", "../escape", "a/b", ".hidden", "a\\b", "__zarr"])
def test_bad_names_are_rejected_and_nothing_escapes_the_store(tmp_path, bad):
    store = DrawStore(tmp_path / "s")
    ll = np.zeros((3, 2))
    with pytest.raises(ValueError, match="invalid run name") as err:
        store.append(bad, "a", ll)
    assert repr(bad) in str(err.value)
    with pytest.raises(ValueError, match="invalid chain name") as err:
        store.append("ok", bad, ll)
    assert repr(bad) in str(err.value)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s"]
    assert not (tmp_path / "escape").exists()


def test_n_mismatch_names_run_chain_and_both_n(tmp_path):
    store = DrawStore(tmp_path / "s")
    store.append("r", "a", np.zeros((2, 5)))
    for chain in ("a", "b"):  # existing chain and a new chain of the same run
        with pytest.raises(ValueError) as err:
            store.append("r", chain, np.zeros((2, 6)))
        msg = str(err.value)
        assert "'r'" in msg and repr(chain) in msg and "n=6" in msg and "n=5" in msg
    store.close()
    with pytest.raises(ValueError, match="n=6.*n=5"):
        DrawStore(tmp_path / "s").append("r", "a", np.zeros((2, 6)))


def test_bad_shapes_and_dtypes(tmp_path):
    store = DrawStore(tmp_path / "s")
    with pytest.raises(ValueError, match="2-D"):
        store.append("r", "a", np.zeros(5))
    with pytest.raises(ValueError, match="numeric"):
        store.append("r", "a", np.array([["x"]]))
    with pytest.raises(ValueError, match="params must be"):
        store.append("r", "a", np.zeros((3, 2)), np.zeros((4, 1)))
    store.append("r", "a", np.zeros((3, 2)), np.zeros((3, 1)))
    with pytest.raises(ValueError, match="p=2 parameters but the chain has p=1"):
        store.append("r", "a", np.zeros((3, 2)), np.zeros((3, 2)))


def test_truncate_beyond_durable_is_an_error(tmp_path):
    store = DrawStore(tmp_path / "s", chunk_draws=4)
    store.append("r", "a", np.zeros((6, 2)))  # 4 durable, 2 pending
    with pytest.raises(ValueError, match="5 draws are committed.*holds only 4"):
        store.truncate("r", "a", 5)


# ---------------------------------------------------------------- a real crash

CRASH_SCRIPT = textwrap.dedent("""
    import os, sys
    import numpy as np
    from chainvigil.storage.draws import DrawStore
    store = DrawStore(sys.argv[1], chunk_draws=8, chunk_obs=4)
    rng = np.random.default_rng(0)
    store.append("r", "a", rng.normal(size=(13, 7)), rng.normal(size=(13, 2)))
    store.flush()                                   # 13 durable: the service commits 10 of them
    store.append("r", "a", rng.normal(size=(6, 7)), rng.normal(size=(6, 2)))  # 16 durable, 3 pending
    sys.stdout.write("ready\\n"); sys.stdout.flush()
    os._exit(9)                                     # killed: no flush, no close
""")


def test_crash_loses_pending_keeps_flushed_and_truncates_to_committed(tmp_path):
    proc = subprocess.run([sys.executable, "-c", CRASH_SCRIPT, str(tmp_path / "s")],
                          cwd=REPO, capture_output=True, text=True, timeout=60,
                          env={**os.environ, "PYTHONPATH": str(REPO)})
    assert proc.returncode == 9 and proc.stdout == "ready\n", proc.stderr
    rng = np.random.default_rng(0)
    ll1, pa1 = rng.normal(size=(13, 7)), rng.normal(size=(13, 2))
    ll2 = rng.normal(size=(6, 7))
    store = DrawStore(tmp_path / "s")
    assert store.length("r", "a") == store.durable_length("r", "a") == 16  # pending 3 are gone
    np.testing.assert_array_equal(store.read_loglik("r", "a"), np.concatenate([ll1, ll2])[:16])
    store.truncate("r", "a", 10)  # the committed length
    np.testing.assert_array_equal(store.read_loglik("r", "a"), ll1[:10])
    np.testing.assert_array_equal(store.read_params("r", "a"), pa1[:10])
    # resuming after the cut: the stale rows 10..15 of the old chunk must never show again
    more = np.full((9, 7), -1.5)
    store.append("r", "a", more, np.zeros((9, 2)))
    store.flush()
    np.testing.assert_array_equal(DrawStore(tmp_path / "s").read_loglik("r", "a"),
                                  np.concatenate([ll1[:10], more]))


def test_draw_numbers_follow_appends_flushes_and_truncation(tmp_path):
    """The draw numbers are stored beside the draws so order and uniqueness can be checked."""
    store = DrawStore(tmp_path / "s.zarr", chunk_draws=8)
    rng = np.random.default_rng(0)
    store.append("r", "c", rng.normal(size=(5, 3)), draw_ids=np.arange(101, 106))
    store.append("r", "c", rng.normal(size=(6, 3)))  # default: position in the chain, from 1
    np.testing.assert_array_equal(store.read_draw_ids("r", "c"), [101, 102, 103, 104, 105, 6, 7, 8, 9, 10, 11])
    store.flush()
    store.truncate("r", "c", 9)
    store.append("r", "c", rng.normal(size=(2, 3)), draw_ids=[50, 51])
    store.flush()
    reopened = DrawStore(tmp_path / "s.zarr", chunk_draws=8)
    np.testing.assert_array_equal(reopened.read_draw_ids("r", "c"), [101, 102, 103, 104, 105, 6, 7, 8, 9, 50, 51])
    np.testing.assert_array_equal(reopened.read_draw_ids("r", "c", draws=slice(8, 10)), [9, 50])
    with pytest.raises(ValueError, match="3 draw numbers for 2 draws"):
        reopened.append("r", "c", rng.normal(size=(2, 3)), draw_ids=[1, 2, 3])


def test_chain_whose_creation_was_cut_short_starts_afresh(tmp_path):
    """A kill between creating a chain's group and its arrays leaves a group without arrays."""
    path = tmp_path / "s.zarr"
    store = DrawStore(path)
    store.append("r", "ok", np.zeros((3, 4)))
    store.flush()
    root = zarr.open_group(str(path), mode="a")
    half = root["r"].create_group("half")
    half.create_array("loglik", shape=(0, 4), dtype="float64", chunks=(256, 4))
    again = DrawStore(path)
    again.truncate("r", "half", 0)  # recovery: nothing was committed for it
    assert again.length("r", "half") == 0
    again.append("r", "half", np.ones((2, 4)), np.ones((2, 1)))
    again.flush()
    np.testing.assert_array_equal(DrawStore(path).read_params("r", "half"), np.ones((2, 1)))
    assert DrawStore(path).length("r", "ok") == 3


# ---------------------------------------------------------------- retention: drop_before

def _folder_bytes(path) -> int:
    return sum(f.stat().st_size for f in Path(path).rglob("*") if f.is_file())


def test_drop_before_releases_whole_chunks_and_keeps_positions(tmp_path):
    rng = np.random.default_rng(40)
    store = DrawStore(tmp_path / "s", chunk_draws=4, chunk_obs=4)
    ll, pa = _block(rng, 19)
    store.append("run", "c1", ll, pa, draw_ids=np.arange(101, 120))
    store.append("run", "c2", *_block(rng, 19))
    store.flush()
    before = _folder_bytes(tmp_path / "s")
    assert store.drop_before("run", "c1", 10) == 8  # rounded down to a chunk boundary
    assert store.kept_from("run", "c1") == 8 and store.kept_from("run", "c2") == 0
    # two row chunks x two column chunks (4 + 3 columns) of 8-byte values are gone
    assert before - _folder_bytes(tmp_path / "s") >= 8 * 7 * 8
    # positions, params and draw numbers unchanged; the kept draws read back exactly
    assert store.length("run", "c1") == 19
    np.testing.assert_array_equal(store.read_loglik("run", "c1", draws=slice(8, None)), ll[8:])
    np.testing.assert_array_equal(store.read_params("run", "c1"), pa)
    np.testing.assert_array_equal(store.read_draw_ids("run", "c1"), np.arange(101, 120))
    # reading dropped draws is refused, never NaN
    with pytest.raises(ValueError, match=r"draws 0:19 .* below position 8 were dropped"):
        store.read_loglik("run", "c1")
    with pytest.raises(ValueError, match="dropped"):
        store.read_all_loglik("run", 0, N)
    with pytest.raises(ValueError, match="dropped"):
        store.read_loglik("run", "c1", draws=slice(7, 9))
    # a smaller position later does not bring anything back; a larger one drops more
    assert store.drop_before("run", "c1", 3) == 8
    assert store.drop_before("run", "c1", 12) == 12


def test_drop_before_survives_reopen_and_appends_continue(tmp_path):
    rng = np.random.default_rng(41)
    store = DrawStore(tmp_path / "s", chunk_draws=4, chunk_obs=4)
    ll, pa = _block(rng, 13)
    store.append("run", "c1", ll, pa)
    store.flush()
    store.drop_before("run", "c1", 8)
    store.close()
    again = DrawStore(tmp_path / "s", chunk_draws=4, chunk_obs=4)
    assert again.kept_from("run", "c1") == 8 and again.length("run", "c1") == 13
    more, more_pa = _block(rng, 6)
    assert again.append("run", "c1", more, more_pa) == 19
    again.flush()
    np.testing.assert_array_equal(again.read_loglik("run", "c1", draws=slice(8, None)),
                                  np.vstack([ll[8:], more]))
    np.testing.assert_array_equal(again.read_draw_ids("run", "c1"), np.arange(1, 20))
    # truncation (crash recovery) above the start works, below it is refused
    again.truncate("run", "c1", 15)
    assert again.length("run", "c1") == 15 and again.kept_from("run", "c1") == 8
    np.testing.assert_array_equal(again.read_loglik("run", "c1", draws=slice(8, None)),
                                  np.vstack([ll[8:], more])[:7])
    with pytest.raises(ValueError, match="cannot truncate to 5 draws"):
        again.truncate("run", "c1", 5)


def test_drop_before_only_durable_draws_and_finishes_an_interrupted_drop(tmp_path):
    rng = np.random.default_rng(42)
    store = DrawStore(tmp_path / "s", chunk_draws=4, chunk_obs=4)
    store.append("run", "c1", *_block(rng, 10))  # 8 durable (two whole chunks), 2 pending
    with pytest.raises(ValueError, match="holds 8 durable draws"):
        store.drop_before("run", "c1", 10)
    # a kill after the new start was recorded but before the files were deleted
    group = zarr.open_group(str(tmp_path / "s"), mode="a")["run"]["c1"]
    group.attrs["kept_from"] = 8
    store = DrawStore(tmp_path / "s", chunk_draws=4, chunk_obs=4)
    chunk_dir = tmp_path / "s" / "run" / "c1" / "loglik" / "c"
    assert (chunk_dir / "0").exists()
    with pytest.raises(ValueError, match="dropped"):  # already unreadable
        store.read_loglik("run", "c1", draws=slice(0, 4))
    assert store.drop_before("run", "c1", 8) == 8  # the next call deletes the leftovers
    assert not any((chunk_dir / str(i)).exists() and any((chunk_dir / str(i)).iterdir()) for i in (0, 1))
