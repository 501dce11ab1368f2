"""Readers of run folders: CSV chains, NPZ chunks, run.json, the root scan (docs/input-format.md).

Every test writes real files in tmp_path and reads them back with the real readers.
"""

from __future__ import annotations

import json
import os
import zipfile
from pathlib import Path

import numpy as np
import pytest

from chainvigil.problems import InputProblem
from chainvigil.readers import (Batch, CsvChainReader, ReaderLimits, load_npz_chunk, parse_header,
                                pending_chunks, read_run_info, scan_root)


def header(n: int, params=("mu",), draw=True) -> str:
    cols = (["draw"] if draw else []) + list(params) + [f"loglik[{i}]" for i in range(1, n + 1)]
    return ",".join(cols) + "\n"


def row(draw: int, params, ll) -> str:
    return ",".join([str(draw), *(repr(float(v)) for v in params), *(repr(float(v)) for v in ll)]) + "\n"


# --------------------------------------------------------------------------------------------------
# header


def test_header_maps_loglik_columns_by_index_whatever_their_order():
    h = parse_header(' "loglik[2]", draw, sigma ,loglik[3],loglik[1],mu\r\n')
    assert h.n == 3
    assert h.loglik_cols == (4, 0, 3)          # field of loglik[1], loglik[2], loglik[3]
    assert h.draw_col == 1
    assert h.param_names == ("sigma", "mu") and h.param_cols == (2, 5)


@pytest.mark.parametrize("line, kind, words", [
    ("draw,mu,sigma\n", "not_ours", "no loglik"),
    ("loglik[1],loglik[3]\n", "bad_header", "missing 2"),
    ("loglik[2],loglik[3]\n", "bad_header", "missing 1"),
    ("loglik[1],loglik[1]\n", "bad_header", "repeats"),
    ("loglik[1],loglik[01]\n", "bad_header", "more than once"),
    ("loglik[0],loglik[1]\n", "bad_header", "loglik[0]"),
    ("mu,,loglik[1]\n", "bad_header", "empty"),
    ("loglik[a],loglik[1]\n", "bad_header", "whole number"),
])
def test_header_problems(line, kind, words):
    with pytest.raises(InputProblem) as err:
        parse_header(line, "/x/run/c.csv")
    assert err.value.kind == kind
    assert words in err.value.problem
    assert str(err.value).startswith("/x/run/c.csv: ")


def test_parameter_named_like_loglik_without_bracket_is_a_parameter():
    h = parse_header("loglik_total,loglik[1]")
    assert h.param_names == ("loglik_total",) and h.n == 1


# --------------------------------------------------------------------------------------------------
# CSV chains


def test_csv_rows_in_column_order_with_comments_blank_lines_and_crlf(tmp_path):
    p = tmp_path / "c.csv"
    p.write_bytes(b"# written by a test\n\nloglik[2],draw,mu,loglik[1]\r\n"
                  b"-1.5,1,0.25,-2.5\r\n# a comment\n   \n-1.25,2,0.5,-2.25\n")
    b = CsvChainReader(p).read_new()
    np.testing.assert_array_equal(b.loglik, [[-2.5, -1.5], [-2.25, -1.25]])
    np.testing.assert_array_equal(b.params, [[0.25], [0.5]])
    assert b.draw_ids.tolist() == [1, 2] and b.param_names == ("mu",)
    assert b.problems == [] and b.end_offset == p.stat().st_size and not b.more


def test_incomplete_trailing_line_waits_until_completed(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text(header(2) + row(1, [0.5], [-1.0, -2.0]) + "2,0.75,-1.5")
    r = CsvChainReader(p)
    b1 = r.read_new()
    assert b1.draws == 1 and b1.draw_ids.tolist() == [1]
    assert r.offset == len(header(2) + row(1, [0.5], [-1.0, -2.0]))
    assert r.read_new().draws == 0                      # still incomplete: nothing new
    with open(p, "a") as f:
        f.write(",-2.5\n")
    b2 = r.read_new()
    np.testing.assert_array_equal(b2.loglik, [[-1.5, -2.5]])
    assert b2.start_offset == b1.end_offset and b2.end_offset == p.stat().st_size


def test_incomplete_header_gives_an_empty_batch_then_reads(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text("draw,loglik[1],logl")
    r = CsvChainReader(p)
    b = r.read_new()
    assert b.draws == 0 and r.header is None and r.offset == 0
    with open(p, "a") as f:
        f.write("ik[2]\n1,-1,-2\n")
    b = r.read_new()
    assert r.header.n == 2 and b.loglik.tolist() == [[-1.0, -2.0]]


def test_bad_rows_are_skipped_with_line_and_byte_and_good_rows_kept(tmp_path):
    p = tmp_path / "c.csv"
    good1 = row(1, [0.5], [-1.0, -2.0])
    short = "2,0.5,-1.0\n"
    text = "3,0.5,abc,-2.0\n"
    frac = "4.5,0.5,-1.0,-2.0\n"
    good2 = row(5, [0.5], [-3.0, -4.0])
    p.write_text(header(2) + good1 + short + text + frac + good2)
    r = CsvChainReader(p)
    b = r.read_new()
    assert b.draw_ids.tolist() == [1, 5]
    np.testing.assert_array_equal(b.loglik, [[-1.0, -2.0], [-3.0, -4.0]])
    assert [q.kind for q in b.problems] == ["bad_row", "non_numeric", "bad_row"]
    first = len(header(2)) + len(good1)
    assert b.problems[0].problem.startswith(f"line 3 (byte {first}) has 3 fields, the header has 4")
    assert "line 4" in b.problems[1].problem and "'abc'" in b.problems[1].problem
    assert "'loglik[1]'" in b.problems[1].problem
    assert "line 5" in b.problems[2].problem and "4.5" in b.problems[2].problem
    assert all(q.path == str(p) for q in b.problems)
    assert b.end_offset == p.stat().st_size             # the offset moved past the bad rows
    r.offset = b.start_offset                           # a rewind keeps the line numbers right
    again = r.read_new()
    assert [q.problem for q in again.problems] == [q.problem for q in b.problems]


def test_many_bad_rows_are_summed_up(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text(header(1) + "".join(f"{d},0.5\n" for d in range(1, 101)) + row(101, [0.5], [-1.0]))
    b = CsvChainReader(p).read_new()
    assert b.draw_ids.tolist() == [101]
    assert len(b.problems) == 21 and "80 more rows skipped" in b.problems[-1].problem


def test_nonfinite_loglik_is_kept_and_reported_with_draw_and_observation(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text(header(3) + row(1, [0.5], [-1.0, -2.0, -3.0]) + "2,0.5,-1.0,nan,-inf\n"
                 + "3,inf,-1,-2,-3\n")
    b = CsvChainReader(p).read_new()
    assert b.draws == 3 and np.isnan(b.loglik[1, 1]) and b.loglik[1, 2] == -np.inf
    ll_problem, par_problem = b.problems
    assert ll_problem.kind == "bad_values" and par_problem.kind == "bad_values"
    assert "draw 2 (observation 2, observation 3)" in ll_problem.problem
    assert "draw 3 (mu)" in par_problem.problem


def test_nonfinite_without_draw_column_names_the_line(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text(header(2, params=(), draw=False) + "-1,-2\n-1,NaN\n")
    b = CsvChainReader(p).read_new()
    assert b.draw_ids is None and b.draws == 2
    assert "line 3 (observation 2)" in b.problems[0].problem


def test_resume_from_offset_with_recorded_header_counts_nothing_twice(tmp_path):
    p = tmp_path / "c.csv"
    rng = np.random.default_rng(7)
    ll = rng.normal(size=(30, 4))
    p.write_text(header(4, params=()) + "".join(row(d + 1, [], ll[d]) for d in range(10)))
    r1 = CsvChainReader(p)
    b1 = r1.read_new()
    with open(p, "a") as f:
        f.write("".join(row(d + 1, [], ll[d]) for d in range(10, 30)) + "3")
    r2 = CsvChainReader(p, offset=b1.end_offset, header=r1.header.line)
    b2 = r2.read_new()
    np.testing.assert_array_equal(np.vstack([b1.loglik, b2.loglik]), ll)
    assert b2.draw_ids.tolist() == list(range(11, 31))


def test_bounded_reads_give_the_same_rows(tmp_path):
    p = tmp_path / "c.csv"
    rng = np.random.default_rng(3)
    ll = rng.normal(size=(200, 5))
    p.write_text(header(5, params=()) + "".join(row(d + 1, [], ll[d]) for d in range(200)))
    r = CsvChainReader(p, max_bytes=1000)
    parts, calls = [], 0
    while True:
        b = r.read_new()
        calls += 1
        assert b.end_offset - b.start_offset <= 1000
        parts.append(b.loglik)
        if not b.more:
            break
    assert calls > 10
    np.testing.assert_array_equal(np.vstack(parts), ll)
    assert r.offset == p.stat().st_size


def test_a_line_longer_than_a_read_is_skipped_and_reported(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text(header(1, params=()) + "1," + "1" * 500 + "\n" + "2,-1.5\n")
    r = CsvChainReader(p, max_bytes=100, limits=ReaderLimits(max_line_bytes=200))
    b = r.read_new()
    assert b.draws == 0 and b.problems[0].kind == "limit_exceeded" and "line 2" in b.problems[0].problem
    assert "max_line_bytes" in b.problems[0].problem and b.problems[0].path == str(p)
    b = r.read_new()
    assert b.draw_ids.tolist() == [2] and b.loglik.tolist() == [[-1.5]]


def test_a_line_longer_than_a_read_but_within_the_line_limit_is_read_whole(tmp_path):
    p = tmp_path / "c.csv"
    long_value = "-1." + "5" * 400
    p.write_text(header(1, params=()) + f"1,{long_value}\n" + "2,-2.5\n")
    r = CsvChainReader(p, max_bytes=100)
    parts = []
    while True:
        b = r.read_new()
        parts.append(b)
        if not b.more:
            break
    ids = np.concatenate([b.draw_ids for b in parts if b.draws]).tolist()
    assert ids == [1, 2] and not any(b.problems for b in parts)
    assert parts[0].loglik[0, 0] == float(long_value)


def test_changed_header_is_raised_until_it_is_back(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text(header(2) + row(1, [0.5], [-1.0, -2.0]))
    r = CsvChainReader(p)
    r.read_new()
    offset = r.offset
    p.write_text(header(3) + row(1, [0.5], [-1.0, -2.0, -3.0]) + row(2, [0.5], [-1.0, -2.0, -3.0]))
    with pytest.raises(InputProblem) as err:
        r.read_new()
    assert err.value.kind == "header_changed" and err.value.path == str(p)
    assert "3 observations" in err.value.problem
    assert r.offset == offset                            # nothing consumed
    p.write_text(header(2) + row(1, [0.5], [-1.0, -2.0]) + row(2, [0.5], [-5.0, -6.0]))
    b = r.read_new()
    assert b.draw_ids.tolist() == [2] and b.loglik.tolist() == [[-5.0, -6.0]]


def test_file_cut_below_the_offset_is_a_problem(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text(header(1) + row(1, [0.5], [-1.0]) + row(2, [0.5], [-2.0]))
    r = CsvChainReader(p)
    r.read_new()
    p.write_text(header(1) + row(1, [0.5], [-1.0]))
    with pytest.raises(InputProblem) as err:
        r.read_new()
    assert err.value.kind == "rewritten" and "shorter" in err.value.problem


def test_file_rewritten_so_the_offset_is_mid_line_is_a_problem(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text(header(1) + row(1, [0.5], [-1.0]))
    r = CsvChainReader(p)
    r.read_new()
    p.write_text(header(1) + "1,0.5,-1.00001\n" + row(2, [0.5], [-2.0]))
    with pytest.raises(InputProblem) as err:
        r.read_new()
    assert err.value.kind == "rewritten"


def test_csv_without_loglik_columns_is_not_ours(tmp_path):
    p = tmp_path / "notes.csv"
    p.write_text("name,value\na,1\n")
    with pytest.raises(InputProblem) as err:
        CsvChainReader(p).read_new()
    assert err.value.kind == "not_ours" and err.value.path == str(p)


def test_missing_file_is_unreadable(tmp_path):
    with pytest.raises(InputProblem) as err:
        CsvChainReader(tmp_path / "gone.csv").read_new()
    assert err.value.kind == "unreadable"


def test_exact_float_round_trip_through_text(tmp_path):
    # repr() of a float is the shortest string that reads back as the same double (Python docs,
    # "Floating point arithmetic"), so the parsed bits must equal the written bits.
    rng = np.random.default_rng(11)
    ll = np.concatenate([rng.normal(size=(50, 3)) * 10.0 ** rng.integers(-300, 300, size=(50, 1)),
                         [[5e-324, -0.0, 1.7976931348623157e308]]])
    p = tmp_path / "c.csv"
    p.write_text(header(3, params=()) + "".join(row(d + 1, [], ll[d]) for d in range(len(ll))))
    b = CsvChainReader(p).read_new()
    assert b.loglik.tobytes() == ll.tobytes()


# --------------------------------------------------------------------------------------------------
# NPZ chunks


def test_npz_chunk_round_trip(tmp_path):
    p = tmp_path / "00000000.npz"
    ll = np.arange(12.0).reshape(4, 3)
    np.savez(p, loglik=ll, params=np.ones((4, 2)), param_names=np.array(["a", "bb"]),
             draw=np.arange(10, 14))
    b = load_npz_chunk(p, n_expected=3, param_names_expected=("a", "bb"))
    assert isinstance(b, Batch) and b.loglik.dtype == np.float64
    np.testing.assert_array_equal(b.loglik, ll)
    assert b.param_names == ("a", "bb") and b.draw_ids.tolist() == [10, 11, 12, 13]
    assert b.end_offset == p.stat().st_size and b.problems == []


def test_npz_float32_is_widened_and_names_optional(tmp_path):
    p = tmp_path / "c.npz"
    np.savez(p, loglik=np.ones((2, 3), dtype=np.float32))
    b = load_npz_chunk(p)
    assert b.loglik.dtype == np.float64 and b.params.shape == (2, 0) and b.draw_ids is None


def test_truncated_npz(tmp_path):
    p = tmp_path / "c.npz"
    np.savez(p, loglik=np.random.default_rng(0).normal(size=(100, 50)))
    data = p.read_bytes()
    p.write_bytes(data[: len(data) // 2])
    with pytest.raises(InputProblem) as err:
        load_npz_chunk(p)
    assert err.value.kind == "truncated_npz" and err.value.path == str(p)


def test_empty_npz_file_is_truncated(tmp_path):
    p = tmp_path / "c.npz"
    p.write_bytes(b"")
    with pytest.raises(InputProblem) as err:
        load_npz_chunk(p)
    assert err.value.kind == "truncated_npz"


@pytest.mark.parametrize("content", [b"draw,loglik[1]\n1,2\n", None])
def test_not_npz(tmp_path, content):
    p = tmp_path / "c.npz"
    if content is None:
        np.save(tmp_path / "single.npy", np.ones((2, 2)))
        (tmp_path / "single.npy").rename(p)
    else:
        p.write_bytes(content)
    with pytest.raises(InputProblem) as err:
        load_npz_chunk(p)
    assert err.value.kind == "not_npz"


class _Canary:
    """Unpickling this object creates a file: proof that something was unpickled."""

    def __init__(self, marker: Path):
        self.marker = marker

    def __reduce__(self):
        return (Path.touch, (self.marker,))


def test_pickled_npz_is_refused_without_loading(tmp_path):
    marker = tmp_path / "unpickled"
    p = tmp_path / "c.npz"
    obj = np.empty(1, dtype=object)
    obj[0] = _Canary(marker)
    np.savez(p, loglik=np.ones((2, 2)), extra=obj)      # np.savez pickles object arrays by default
    with pytest.raises(InputProblem) as err:
        load_npz_chunk(p)
    assert err.value.kind == "pickled_npz" and "'extra'" in err.value.problem
    assert not marker.exists()


def test_pickled_loglik_is_refused(tmp_path):
    p = tmp_path / "c.npz"
    np.savez(p, loglik=np.array([[1.0, "x"]], dtype=object))
    with pytest.raises(InputProblem) as err:
        load_npz_chunk(p)
    assert err.value.kind == "pickled_npz"


@pytest.mark.parametrize("arrays, words", [
    ({"ll": np.ones((2, 2))}, "no array named 'loglik'"),
    ({"loglik": np.ones(4)}, "shape (4,)"),
    ({"loglik": np.ones((2, 2), dtype=np.int64)}, "floating point"),
    ({"loglik": np.ones((2, 0))}, "no observations"),
    ({"loglik": np.ones((2, 2)), "params": np.ones((3, 1))}, "'params' has shape (3, 1)"),
    ({"loglik": np.ones((2, 2)), "params": np.ones((2, 2)), "param_names": np.array([b"a", b"b"])},
     "fixed-width unicode"),
    ({"loglik": np.ones((2, 2)), "params": np.ones((2, 2)), "param_names": np.array(["a"])},
     "1 names for 2"),
    ({"loglik": np.ones((2, 2)), "param_names": np.array(["a"])}, "no 'params'"),
    ({"loglik": np.ones((2, 2)), "draw": np.array([1.0, 2.0])}, "'draw'"),
])
def test_malformed_npz(tmp_path, arrays, words):
    p = tmp_path / "c.npz"
    np.savez(p, **arrays)
    with pytest.raises(InputProblem) as err:
        load_npz_chunk(p)
    assert err.value.kind == "bad_npz" and words in err.value.problem


def test_npz_n_mismatch_and_changed_names(tmp_path):
    p = tmp_path / "c.npz"
    np.savez(p, loglik=np.ones((2, 3)), params=np.ones((2, 1)), param_names=np.array(["mu"]))
    with pytest.raises(InputProblem) as err:
        load_npz_chunk(p, n_expected=4)
    assert err.value.kind == "n_mismatch" and "3 observations" in err.value.problem
    with pytest.raises(InputProblem) as err:
        load_npz_chunk(p, param_names_expected=("sigma",))
    assert err.value.kind == "header_changed"


def test_npz_nonfinite_values_are_kept_and_reported(tmp_path):
    p = tmp_path / "c.npz"
    ll = np.zeros((3, 4))
    ll[2, 0] = np.inf
    np.savez(p, loglik=ll, draw=np.array([7, 8, 9]))
    b = load_npz_chunk(p)
    assert b.loglik[2, 0] == np.inf
    assert [q.kind for q in b.problems] == ["bad_values"]
    assert "draw 9 (observation 1)" in b.problems[0].problem


def test_pending_chunks_in_name_order_without_temp_files(tmp_path):
    for name in ["00000002.npz", "00000000.npz", "00000001.npz", ".00000003.npz.tmp", "readme.txt"]:
        (tmp_path / name).write_bytes(b"x")
    (tmp_path / "sub.npz").mkdir()
    assert pending_chunks(tmp_path, set()) == ["00000000.npz", "00000001.npz", "00000002.npz"]
    assert pending_chunks(tmp_path, {"00000000.npz"}) == ["00000001.npz", "00000002.npz"]
    assert pending_chunks(tmp_path / "missing", set()) == []


# --------------------------------------------------------------------------------------------------
# run.json


def test_run_info_fields_and_unknown_keys(tmp_path):
    p = tmp_path / "run.json"
    info = {"title": "t", "dataset": "d", "observation_labels": ["a", "b"], "n_params": 2,
            "point_loglik": -10, "targets": {"rhat": 1.01, "note": "x"}, "sampler": "hmc"}
    p.write_text(json.dumps(info))
    got = read_run_info(p)
    assert "sampler" not in got
    assert got["point_loglik"] == -10.0 and isinstance(got["point_loglik"], float)
    assert got["observation_labels"] == ["a", "b"] and got["targets"]["rhat"] == 1.01


@pytest.mark.parametrize("text, kind, words", [
    ('{"title": "t", "n_par', "bad_run_info", "not valid JSON"),
    ("", "bad_run_info", "not valid JSON"),
    ('["title"]', "bad_run_info", "JSON object"),
])
def test_unusable_run_info_is_raised(tmp_path, text, kind, words):
    p = tmp_path / "run.json"
    p.write_text(text)
    with pytest.raises(InputProblem) as err:
        read_run_info(p)
    assert err.value.kind == kind and words in err.value.problem
    assert str(err.value).startswith(str(p))


@pytest.mark.parametrize("field, value", [
    ("n_params", "3"), ("n_params", True), ("n_params", -1), ("n_params", 2**63),
    ("observation_labels", ["a", 2]), ("observation_labels", []),
    ("point_loglik", float("nan")), ("point_loglik", 1e308), ("title", 5), ("targets", [1]),
    ("loglik", ""), ("loglik", "log lik"), ("loglik", 7), ("warmup", -1), ("warmup", 1.5), ("thin", 0),
    ("thin", True), ("params", "mu"), ("ignore", [3]),
])
def test_a_bad_run_info_field_is_dropped_with_a_problem_and_the_rest_kept(tmp_path, field, value):
    p = tmp_path / "run.json"
    p.write_text(json.dumps({"title": "kept", field: value, "dataset": "also kept"}) if field != "title"
                 else json.dumps({field: value, "dataset": "also kept"}))
    got = read_run_info(p)
    assert field not in got and got["dataset"] == "also kept"
    assert [q.kind for q in got.problems] == ["bad_run_info"]
    assert got.problems[0].path == str(p) and repr(field) in got.problems[0].problem


@pytest.mark.parametrize("value", [1e308, 1e-200, float("inf"), [1], {"a": 1}])
def test_a_bad_target_is_dropped_alone(tmp_path, value):
    p = tmp_path / "run.json"
    p.write_text(json.dumps({"targets": {"rhat": 1.01, "bad": value, "note": "x"}}))
    got = read_run_info(p)
    assert got["targets"] == {"rhat": 1.01, "note": "x"}
    assert len(got.problems) == 1 and "'bad'" in got.problems[0].problem


# --------------------------------------------------------------------------------------------------
# scanning the root


def test_scan_root_finds_runs_chains_and_problems(tmp_path):
    root = tmp_path / "root"
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    (outside / "c9.csv").write_text(header(1))
    r1 = root / "model_a"
    (r1 / "c2").mkdir(parents=True)
    (r1 / "c1.csv").write_text(header(1))
    (r1 / "c2" / "00000000.npz").write_bytes(b"x")
    (r1 / "c2" / ".00000001.npz.tmp").write_bytes(b"x")
    (r1 / "c2" / "stray.txt").write_text("x")
    (r1 / "run.json").write_text("{}")
    (r1 / "ENOUGH.json").write_text("{}")
    (r1 / "notes.txt").write_text("x")
    (r1 / ".hidden.csv").write_text("x")
    (r1 / "c3.csv").symlink_to(outside / "c9.csv")
    (r1 / "c4.csv").symlink_to(r1 / "c1.csv")           # inside the root: followed
    (root / "model_b").mkdir()
    (root / "linked").symlink_to(outside, target_is_directory=True)
    (root / ".chainvigil" / "x").mkdir(parents=True)
    (root / "state" / "y").mkdir(parents=True)
    (root / "README").write_text("x")

    seen: set = set()
    scan = scan_root(root, ignore=[root / "state"], seen=seen)
    assert sorted(scan) == ["model_a", "model_b"]
    a = scan["model_a"]
    assert a.csv_chains == {"c1": str(r1 / "c1.csv"), "c4": str(r1 / "c4.csv")}
    assert a.npz_chains == {"c2": str(r1 / "c2")}
    assert a.run_info == str(r1 / "run.json") and a.chains == ["c1", "c2", "c4"]
    kinds = {(Path(q.path).name, q.kind) for q in scan.problems}
    assert kinds == {("c3.csv", "outside_root"), ("linked", "outside_root"), ("notes.txt", "not_ours"),
                     ("stray.txt", "not_ours"), ("README", "not_ours"), (".hidden.csv", "bad_name")}
    assert all(q in scan.problems for q in a.problems) and len(a.problems) == 4
    again = scan_root(root, ignore=[root / "state"], seen=seen)
    assert again.problems == [] and sorted(again) == ["model_a", "model_b"]
    assert sorted(scan_root(root, ignore=[root / "state"], only=["model_b"])) == ["model_b"]


def test_scan_then_read_reports_a_foreign_csv(tmp_path):
    run = tmp_path / "run1"
    run.mkdir()
    (run / "table.csv").write_text("name,value\n")
    scan = scan_root(tmp_path)
    with pytest.raises(InputProblem) as err:
        CsvChainReader(scan["run1"].csv_chains["table"]).read_new()
    assert err.value.kind == "not_ours"


def test_problem_pickles_and_prints():
    import pickle
    q = InputProblem("/r/a.csv", "line 3 is short", "bad_row")
    assert str(q) == "/r/a.csv: line 3 is short"
    assert pickle.loads(pickle.dumps(q)) == q and q.key == ("/r/a.csv", "bad_row")
