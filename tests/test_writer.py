"""The public chain writer, read back by the readers (docs/input-format.md)."""

from __future__ import annotations

import json
import os
import tempfile

import numpy as np
import pytest
from hypothesis import given, settings, HealthCheck
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from _tiers import examples
from chainvigil.readers import CsvChainReader, load_npz_chunk, pending_chunks, read_run_info, scan_root
from chainvigil.writer import ChainWriter, enough_signalled, write_run_info

floats = st.floats(allow_nan=True, allow_infinity=True, width=64)


def same_floats(a: np.ndarray, b: np.ndarray) -> bool:
    """Bit-equal except that any NaN equals any NaN (NaN payloads are not part of the contract)."""
    if a.shape != b.shape:
        return False
    nan_a, nan_b = np.isnan(a), np.isnan(b)
    return bool(np.array_equal(nan_a, nan_b)
                and a[~nan_a].tobytes() == b[~nan_b].tobytes())


def read_csv_all(reader: CsvChainReader):
    parts = []
    while True:
        b = reader.read_new()
        parts.append(b)
        if not b.more:
            return parts


def read_npz_all(chunk_dir: str, taken: set):
    out = []
    for name in pending_chunks(chunk_dir, taken):
        out.append(load_npz_chunk(os.path.join(chunk_dir, name)))
        taken.add(name)
    return out


@st.composite
def blocks(draw):
    n = draw(st.integers(1, 6))
    p = draw(st.integers(0, 3))
    sizes = draw(st.lists(st.integers(0, 7), min_size=1, max_size=5))
    ll = [draw(hnp.arrays(np.float64, (s, n), elements=floats)) for s in sizes]
    pa = [draw(hnp.arrays(np.float64, (s, p), elements=floats)) for s in sizes]
    return n, p, ll, pa


@pytest.mark.parametrize("fmt", ["csv", "npz"])
@settings(max_examples=examples(40), deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=blocks())
def test_round_trip_is_exact_in_any_block_sizes(fmt, data):
    n, p, ll_blocks, pa_blocks = data
    names = tuple(f"theta{j}" for j in range(p))
    with tempfile.TemporaryDirectory() as run:
        reader = CsvChainReader(os.path.join(run, "c1.csv")) if fmt == "csv" else None
        taken: set = set()
        got = []
        with ChainWriter(run, "c1", names, fmt=fmt) as w:
            for ll, pa in zip(ll_blocks, pa_blocks):
                w.append(ll, pa if p else None)
                # read between appends: the reader sees whole draws only, each once
                if fmt == "csv":
                    got += read_csv_all(reader) if os.path.exists(reader.path) else []
                else:
                    got += read_npz_all(os.path.join(run, "c1"), taken)
        want_ll = np.vstack(ll_blocks)
        want_pa = np.vstack(pa_blocks)
        got = [b for b in got if b.draws]
        total = sum(b.draws for b in got)
        assert total == want_ll.shape[0]
        if total:
            assert same_floats(np.vstack([b.loglik for b in got]), want_ll)
            assert same_floats(np.vstack([b.params for b in got]), want_pa)
            assert np.concatenate([b.draw_ids for b in got]).tolist() == list(range(1, total + 1))
            assert all(b.param_names == names for b in got)
            has_nonfinite = not np.isfinite(want_ll).all() or not np.isfinite(want_pa).all()
            reported = any(q.kind == "bad_values" for b in got for q in b.problems)
            assert reported == has_nonfinite
        if fmt == "npz":
            assert not [f for f in os.listdir(os.path.join(run, "c1")) if f.startswith(".")]


def test_csv_layout_header_once_and_whole_lines(tmp_path):
    with ChainWriter(tmp_path, "a", ("mu", "sigma"), fmt="csv") as w:
        w.append([[-1.5, -2.0]], [[0.1, 2.0]])
        w.append([[-1.25, -2.5], [-3.0, -4.0]], [[0.2, 2.5], [0.3, 3.0]])
    lines = (tmp_path / "a.csv").read_text().splitlines(keepends=True)
    assert lines == ["draw,mu,sigma,loglik[1],loglik[2]\n", "1,0.1,2.0,-1.5,-2.0\n",
                     "2,0.2,2.5,-1.25,-2.5\n", "3,0.3,3.0,-3.0,-4.0\n"]


def test_csv_reopen_continues_draws_and_drops_a_partial_line(tmp_path):
    with ChainWriter(tmp_path, "a", fmt="csv") as w:
        w.append(np.zeros((3, 2)))
    with open(tmp_path / "a.csv", "a") as f:
        f.write("4,-1.0")                                  # an append cut short by a kill
    with ChainWriter(tmp_path, "a", fmt="csv") as w:
        assert w.n == 2 and w.next_draw == 4
        w.append(np.ones((2, 2)))
    b = CsvChainReader(tmp_path / "a.csv").read_new()
    assert b.draw_ids.tolist() == [1, 2, 3, 4, 5] and b.problems == []
    np.testing.assert_array_equal(b.loglik[3:], np.ones((2, 2)))


def test_csv_reopen_with_other_parameters_is_refused(tmp_path):
    with ChainWriter(tmp_path, "a", ("mu",), fmt="csv") as w:
        w.append(np.zeros((1, 2)), np.zeros((1, 1)))
    with pytest.raises(ValueError, match="header"):
        ChainWriter(tmp_path, "a", ("sigma",), fmt="csv")


def test_npz_reopen_continues_chunk_numbers_and_draws(tmp_path):
    with ChainWriter(tmp_path, "c", ("mu",)) as w:
        w.append(np.zeros((2, 3)), np.zeros((2, 1)))
        w.append(np.zeros((2, 3)), np.zeros((2, 1)))
    (tmp_path / "c" / ".00000002.npz.tmp").write_bytes(b"half a chunk")   # an interrupted append
    with ChainWriter(tmp_path, "c", ("mu",)) as w:
        assert w.next_draw == 5 and w.n == 3
        w.append(np.ones((1, 3)), np.ones((1, 1)))
    assert sorted(os.listdir(tmp_path / "c")) == ["00000000.npz", "00000001.npz", "00000002.npz"]
    b = load_npz_chunk(tmp_path / "c" / "00000002.npz")
    assert b.draw_ids.tolist() == [5]
    with pytest.raises(ValueError, match="parameters"):
        ChainWriter(tmp_path, "c", ("sigma",))


def test_explicit_draw_ids(tmp_path):
    with ChainWriter(tmp_path, "c", fmt="csv") as w:
        w.append(np.zeros((2, 1)), draw_ids=[10, 20])
        w.append(np.zeros((1, 1)))
        with pytest.raises(ValueError, match="increase"):
            w.append(np.zeros((1, 1)), draw_ids=[5])
    assert CsvChainReader(tmp_path / "c.csv").read_new().draw_ids.tolist() == [10, 20, 21]


@pytest.mark.parametrize("fmt", ["csv", "npz"])
def test_append_validates_shapes(tmp_path, fmt):
    w = ChainWriter(tmp_path, "c", ("mu", "sigma"), fmt=fmt)
    with pytest.raises(ValueError, match="2-D"):
        w.append(np.zeros(3), np.zeros((3, 2)))
    with pytest.raises(ValueError, match="required"):
        w.append(np.zeros((3, 2)))
    with pytest.raises(ValueError, match=r"expected \(3, 2\)"):
        w.append(np.zeros((3, 2)), np.zeros((3, 1)))
    with pytest.raises(ValueError, match="numbers"):
        w.append(np.array([["a"]]), np.zeros((1, 2)))
    w.append(np.zeros((3, 4)), np.zeros((3, 2)))
    with pytest.raises(ValueError, match="has 4"):
        w.append(np.zeros((3, 5)), np.zeros((3, 2)))
    w.close()
    with pytest.raises(ValueError, match="closed"):
        w.append(np.zeros((3, 4)), np.zeros((3, 2)))


@pytest.mark.parametrize("chain, names, words", [
    ("", (), "chain name"),
    (".hidden", (), "chain name"),
    ("a/b", (), "chain name"),
    ("c.csv", (), "chain name"),
    ("c", ("a,b",), "commas"),
    ("c", ("draw",), "reserved"),
    ("c", ("loglik[1]",), "reserved"),
    ("c", ("mu", "mu"), "repeat"),
    ("c", "mu", "sequence"),
])
def test_names_are_validated(tmp_path, chain, names, words):
    with pytest.raises(ValueError, match=words):
        ChainWriter(tmp_path, chain, names)


def test_params_without_names_is_refused(tmp_path):
    with ChainWriter(tmp_path, "c") as w, pytest.raises(ValueError, match="expected"):
        w.append(np.zeros((1, 1)), np.zeros((1, 2)))


def test_run_info_round_trip_atomic(tmp_path):
    path = write_run_info(tmp_path, title="Normal model", dataset="heights", n_params=np.int64(2),
                          observation_labels=("a", "b"), point_loglik=np.float64(-3.5),
                          targets={"rhat": 1.01})
    assert path == str(tmp_path / "run.json")
    assert os.listdir(tmp_path) == ["run.json"]
    assert read_run_info(path) == {"title": "Normal model", "dataset": "heights", "n_params": 2,
                                   "observation_labels": ["a", "b"], "point_loglik": -3.5,
                                   "targets": {"rhat": 1.01}}
    assert json.loads((tmp_path / "run.json").read_text())["n_params"] == 2


@pytest.mark.parametrize("fields, words", [
    ({"titel": "x"}, "unknown"),
    ({"n_params": 2.5}, "'n_params'"),
    ({"point_loglik": float("inf")}, "'point_loglik'"),
    ({"observation_labels": "ab"}, "'observation_labels'"),
])
def test_run_info_is_validated(tmp_path, fields, words):
    with pytest.raises(ValueError, match=words):
        write_run_info(tmp_path, **fields)
    assert not (tmp_path / "run.json").exists()


def test_written_folder_scans_as_a_run(tmp_path):
    run = tmp_path / "m1"
    with ChainWriter(run, "a", fmt="csv") as w1, ChainWriter(run, "b") as w2:
        w1.append(np.zeros((1, 2)))
        w2.append(np.zeros((1, 2)))
    write_run_info(run, title="t")
    scan = scan_root(tmp_path)
    assert scan["m1"].chains == ["a", "b"] and scan.problems == []
    assert not enough_signalled(run)
    (run / "ENOUGH.json").write_text("{}")
    assert enough_signalled(run)
