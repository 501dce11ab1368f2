"""Reading chains as samplers write them: the log-likelihood under any name and index style, two
indices flattened row-major, warm-up draws in the same file, thinning, and bookkeeping columns.

Every test writes real files and reads them back with the real readers.
"""

from __future__ import annotations

import json
import random

import numpy as np
import pytest

from chainvigil.problems import InputProblem
from chainvigil.readers import (CsvChainReader, ReadOptions, load_npz_chunk, parse_header, read_options,
                                read_run_info, scan_root)


def idx_name(name, style, *idx):
    """A column name as samplers write it; ``name[i,j]`` is quoted in CSV because of its comma."""
    if style == "[]":
        inner = ",".join(map(str, idx))
        return f'"{name}[{inner}]"' if len(idx) > 1 else f"{name}[{inner}]"
    return name + "".join(f"{style}{i}" for i in idx)


@pytest.mark.parametrize("style", ["[]", ".", "_"])
def test_one_index_in_each_style_under_any_name(tmp_path, style):
    rng = np.random.default_rng(1)
    ll = rng.normal(-1, 0.3, size=(5, 4))
    cols = [idx_name("log_lik", style, i) for i in range(1, 5)]
    order = [2, 0, 3, 1]                                   # columns written out of order
    p = tmp_path / "c.csv"
    p.write_text(",".join(["draw", "mu"] + [cols[k] for k in order]) + "\n" + "".join(
        f"{d + 1},{d * 0.1!r}," + ",".join(repr(float(ll[d, k])) for k in order) + "\n" for d in range(5)))
    b = CsvChainReader(p, options=ReadOptions(loglik="log_lik")).read_new()
    np.testing.assert_array_equal(b.loglik, ll)
    assert b.param_names == ("mu",) and b.obs_shape == (4,) and b.obs_labels is None


@pytest.mark.parametrize("style", ["[]", ".", "_"])
def test_two_indices_are_flattened_row_major(tmp_path, style):
    rows, cols = 3, 4
    pairs = [(i, j) for i in range(1, rows + 1) for j in range(1, cols + 1)]
    shuffled = pairs[:]
    random.Random(7).shuffle(shuffled)
    values = {(i, j): -(10 * i + j) for i, j in pairs}        # value tells where it must land
    p = tmp_path / "c.csv"
    p.write_text(",".join(["draw"] + [idx_name("ll", style, i, j) for i, j in shuffled]) + "\n"
                 + "1," + ",".join(str(values[pr]) for pr in shuffled) + "\n")
    b = CsvChainReader(p, options=ReadOptions(loglik="ll")).read_new()
    assert b.obs_shape == (3, 4)
    # row-major: [i, j] at column (i - 1) * J + (j - 1)
    assert b.loglik[0].tolist() == [-(10 * i + j) for i in range(1, 4) for j in range(1, 5)]
    assert b.obs_labels == ["1,1", "1,2", "1,3", "1,4", "2,1", "2,2", "2,3", "2,4", "3,1", "3,2", "3,3", "3,4"]


@pytest.mark.parametrize("line, words", [
    ("loglik[1],loglik.2", "mixes log-likelihood column styles"),
    ('loglik[1],"loglik[1,2]"', "mixes one-index and two-index"),
    ('"loglik[1,1]","loglik[1,2]","loglik[2,1]"', "every pair"),
    ('"loglik[1,1]","loglik[1,1]","loglik[2,2]","loglik[2,1]"', "repeats"),
    ("loglik_1_1,loglik_01_1,loglik_2_1,loglik_2_2", "more than once"),
    ('"loglik[0,1]"', "index 0"),
    ("loglik[1,2]", "double quotes"),
])
def test_two_index_and_style_problems(line, words):
    with pytest.raises(InputProblem) as err:
        parse_header(line, "/r/c.csv")
    assert err.value.kind == "bad_header" and words in err.value.problem


def test_columns_starting_with_the_name_but_not_indexed_are_other_columns():
    h = parse_header("log_lik_total,log_lik_1,log_lik_2,log_lik", options=ReadOptions(loglik="log_lik"))
    assert h.n == 2 and h.style == "_" and h.param_names == ("log_lik_total", "log_lik")


def test_warmup_rows_are_returned_flagged_and_resumable(tmp_path):
    p = tmp_path / "c.csv"
    lines = ["draw,mu,loglik[1]"] + [f"{d},{d},{-d}" for d in range(1, 11)]
    p.write_text("\n".join(lines[:5]) + "\n")                 # draws 1-4
    opts = ReadOptions(warmup=6)
    r = CsvChainReader(p, options=opts)
    b1 = r.read_new()
    assert b1.draw_ids.tolist() == [1, 2, 3, 4] and b1.warmup_rows == 4 and b1.end_position == 4
    with open(p, "a") as f:
        f.write("\n".join(lines[5:8]) + "\n")                 # draws 5-7
    b2 = r.read_new()
    assert b2.draw_ids.tolist() == [5, 6, 7] and b2.warmup_rows == 2 and b2.positions.tolist() == [4, 5, 6]
    with open(p, "a") as f:
        f.write("\n".join(lines[8:]) + "\n")                  # draws 8-10
    # a restarted reader resumes from the committed offset and position
    r2 = CsvChainReader(p, offset=b2.end_offset, header=r.header.line, options=opts,
                        position=b2.end_position, last_draw=b2.last_draw)
    b3 = r2.read_new()
    assert b3.draw_ids.tolist() == [8, 9, 10] and b3.warmup_rows == 0 and b3.positions.tolist() == [7, 8, 9]


def test_thinning_counts_from_the_first_draw_after_warmup(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text("draw,loglik[1]\n" + "".join(f"{d},{-d}\n" for d in range(1, 13)))
    opts = ReadOptions(warmup=2, thin=3)
    kept, warm = [], 0
    r = CsvChainReader(p, options=opts, max_bytes=20)         # many small reads: the count carries over
    while True:
        b = r.read_new()
        kept += b.draw_ids.tolist() if b.draws else []
        warm += b.warmup_rows
        if not b.more:
            break
    # positions 0,1 warm-up; then 2, 5, 8, 11 (draws 3, 6, 9, 12)
    assert kept == [1, 2, 3, 6, 9, 12] and warm == 2 and r.position == 12


def test_thinning_without_warmup_keeps_the_first_draw():
    opts = ReadOptions(thin=4)
    assert np.flatnonzero(opts.keep(np.arange(10))).tolist() == [0, 4, 8]


def test_params_and_ignore_patterns_choose_the_parameters():
    line = "draw,lp__,accept_stat__,mu,tau,theta[1],theta[2],z.1,z.2,loglik[1]"
    assert parse_header(line).param_names == ("mu", "tau", "theta[1]", "theta[2]", "z.1", "z.2")
    assert parse_header(line, options=ReadOptions(params=("theta*", "mu"))).param_names == (
        "mu", "theta[1]", "theta[2]")
    assert parse_header(line, options=ReadOptions(ignore=("z.*",))).param_names == (
        "mu", "tau", "theta[1]", "theta[2]")
    assert parse_header(line, options=ReadOptions(params=("lp__", "mu"), ignore=("mu",))).param_names == ("lp__",)


def test_read_options_from_run_json_over_root_defaults(tmp_path):
    defaults = ReadOptions(loglik="log_lik", warmup=1000, ignore=("z*",))
    p = tmp_path / "run.json"
    p.write_text(json.dumps({"warmup": 500, "thin": 2, "params": ["mu", "sigma"]}))
    opts = read_options(read_run_info(p), defaults)
    assert opts == ReadOptions(loglik="log_lik", warmup=500, thin=2, params=("mu", "sigma"), ignore=("z*",))
    assert read_options(None, defaults) is defaults and read_options({}) == ReadOptions()
    with pytest.raises(ValueError):
        ReadOptions(thin=0)


def test_generic_sampler_csv_with_bookkeeping_columns_and_warmup(tmp_path):
    """An invented hierarchical model of six schools' test scores: a sampler writes comment lines,
    bookkeeping columns ending in __, parameters, and log_lik.1..log_lik.6; 4 warm-up draws first."""
    run = tmp_path / "root" / "schools"
    run.mkdir(parents=True)
    (run / "run.json").write_text(json.dumps({"loglik": "log_lik", "warmup": 4, "thin": 2}))
    rng = np.random.default_rng(3)
    book = ["lp__", "accept_stat__", "stepsize__", "treedepth__", "n_leapfrog__", "divergent__", "energy__"]
    params = ["mu", "tau", "theta.1", "theta.2"]
    ll_cols = [f"log_lik.{i}" for i in range(1, 7)]
    draws = 12
    values = rng.normal(size=(draws, len(book) + len(params) + 6))
    text = ["# sampler=hmc seed=3", "# adaptation: warm-up 4 draws", ",".join(book + params + ll_cols)]
    for d in range(draws):
        if d == 4:
            text.append("# adaptation terminated")
            text.append("# step size = 0.41")
        text.append(",".join(repr(float(v)) for v in values[d]))
    (run / "chain-1.csv").write_text("\n".join(text) + "\n")

    folder = scan_root(tmp_path / "root")["schools"]
    opts = read_options(read_run_info(folder.run_info))
    b = CsvChainReader(folder.csv_chains["chain-1"], options=opts).read_new()
    assert b.problems == [] and b.draw_ids is None
    assert b.param_names == ("mu", "tau", "theta.1", "theta.2")
    # warm-up draws 0-3 all kept; after warm-up, positions 4, 6, 8, 10
    rows = [0, 1, 2, 3, 4, 6, 8, 10]
    assert b.positions.tolist() == rows and b.warmup_rows == 4
    np.testing.assert_array_equal(b.loglik, values[rows][:, len(book) + len(params):])
    np.testing.assert_array_equal(b.params, values[rows][:, len(book):len(book) + len(params)])


def test_npz_chunks_with_a_named_three_d_loglik_warmup_and_chosen_params(tmp_path):
    rng = np.random.default_rng(5)
    ll = rng.normal(size=(6, 2, 3))
    names = np.array(["mu", "lp__", "sigma"])
    p = tmp_path / "00000001.npz"
    np.savez(p, log_lik=ll, params=rng.normal(size=(6, 3)), param_names=names, draw=np.arange(1, 7))
    opts = ReadOptions(loglik="log_lik", warmup=2)
    b = load_npz_chunk(p, options=opts)
    assert b.obs_shape == (2, 3) and b.obs_labels[:4] == ["1,1", "1,2", "1,3", "2,1"]
    np.testing.assert_array_equal(b.loglik, ll.reshape(6, 6))
    assert b.loglik[0, 3] == ll[0, 1, 0]                    # [2, 1] at (2 - 1) * 3 + (1 - 1)
    assert b.param_names == ("mu", "sigma") and b.warmup_rows == 2 and b.end_position == 6
    with pytest.raises(InputProblem) as err:
        load_npz_chunk(p)                                  # default name 'loglik' is not there
    assert err.value.kind == "bad_npz" and "'loglik'" in err.value.problem


def test_quoted_two_index_header_is_recorded_and_read_back(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text('draw,"ll[1,1]","ll[1,2]","ll[2,1]","ll[2,2]"\n1,-1,-2,-3,-4\n')
    opts = ReadOptions(loglik="ll")
    r = CsvChainReader(p, options=opts)
    b = r.read_new()
    recorded = r.header.line
    assert parse_header(recorded, options=opts) == r.header
    with open(p, "a") as f:
        f.write("2,-5,-6,-7,-8\n")
    again = CsvChainReader(p, offset=b.end_offset, header=recorded, options=opts, position=1, last_draw=1).read_new()
    assert again.loglik.tolist() == [[-5, -6, -7, -8]] and again.problems == []


def test_one_shot_reading_of_a_run_follows_run_json_and_leaves_warmup_out(tmp_path):
    from chainvigil.oneshot import read_run_folder
    run = tmp_path / "fit"
    (run / "chain-2").mkdir(parents=True)
    (run / "run.json").write_text(json.dumps({"loglik": "log_lik", "warmup": 3, "thin": 2,
                                              "n_params": -4}))
    (run / "chain-1.csv").write_text("lp__,mu,log_lik_1,log_lik_2\n"
                                     + "".join(f"{-d},{d},{-d},{-2 * d}\n" for d in range(1, 11)))
    for k, first in enumerate((1, 6)):
        ids = np.arange(first, first + 5)
        np.savez(run / "chain-2" / f"0000000{k + 1}.npz", log_lik=-np.stack([ids, 2 * ids], axis=1).astype(float),
                 draw=ids)
    chains, info, problems = read_run_folder(run)
    # positions 0-2 warm-up (left out); kept after warm-up: positions 3, 5, 7, 9 = values 4, 6, 8, 10
    assert chains["chain-1"][0][:, 0].tolist() == [-4, -6, -8, -10]
    assert chains["chain-1"][2] == ["mu"]
    assert chains["chain-2"][0][:, 0].tolist() == [-4, -6, -8, -10]
    assert info.get("warmup") == 3 and "n_params" not in info
    assert [q.kind for q in problems] == ["bad_run_info"]


def test_a_recorded_header_unusable_with_new_options_is_a_problem_at_read_time(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text("draw,loglik[1]\n1,-1\n")
    r = CsvChainReader(p, offset=15, header="draw,loglik[1]", options=ReadOptions(loglik="log_lik"))
    with pytest.raises(InputProblem) as err:
        r.read_new()
    assert err.value.kind == "header_changed" and err.value.path == str(p) and "log_lik" in err.value.problem
