"""Hostile input at the reader level: every case gives an InputProblem naming the file, with a kind,
never an uncaught exception, a block or unbounded memory; valid draws around the bad input are kept.

Every hostile file is built for real (FIFOs with os.mkfifo, sockets with socket.bind, zip members
crafted with zipfile and their header bytes patched, names as raw bytes).
"""

from __future__ import annotations

import io
import json
import os
import socket
import struct
import tempfile
import threading
import zipfile
from pathlib import Path

import numpy as np
import pytest

from chainvigil.problems import InputProblem
from chainvigil.readers import (CsvChainReader, ReaderLimits, load_npz_chunk, name_problem, open_regular,
                                parse_header, pending_chunks, read_run_info, scan_root)


def csv_text(draws=(1, 2, 3), n=2) -> str:
    lines = ["draw,mu," + ",".join(f"loglik[{i}]" for i in range(1, n + 1))]
    lines += [f"{d},{d * 0.5}," + ",".join(str(-d - i / 10) for i in range(1, n + 1)) for d in draws]
    return "\n".join(lines) + "\n"


def finishes(fn, timeout=20.0):
    """Run ``fn`` in a thread; fail (instead of hanging the suite) if it does not return in time."""
    box = {}

    def run():
        try:
            box["value"] = fn()
        except BaseException as exc:  # noqa: BLE001 - handed back to the test
            box["error"] = exc

    t = threading.Thread(target=run, daemon=True)
    t.start()
    t.join(timeout)
    assert not t.is_alive(), "the reader blocked"
    if "error" in box:
        raise box["error"]
    return box.get("value")


# --------------------------------------------------------------------------------------------------
# names the store cannot hold


BAD_RUN_NAMES = ["__x", "a\\b", "zarr.json", ".hidden_run", "r" * 250, "ctl\x01name", "tab\tname"]


@pytest.mark.parametrize("bad", BAD_RUN_NAMES)
def test_bad_run_names_are_reported_and_skipped_and_good_runs_kept(tmp_path, bad):
    root = tmp_path / "root"
    (root / "good").mkdir(parents=True)
    (root / "good" / "c1.csv").write_text(csv_text())
    (root / bad).mkdir()
    (root / bad / "c1.csv").write_text(csv_text())
    scan = scan_root(root)
    assert sorted(scan) == ["good"]
    assert [q.kind for q in scan.problems] == ["bad_name"]
    assert scan.problems[0].path.startswith(str(root) + os.sep)
    assert "ignored" in scan.problems[0].problem


def test_run_name_not_utf8_on_disk_is_reported_with_a_printable_path(tmp_path):
    root = tmp_path / "root"
    (root / "good").mkdir(parents=True)
    (root / "good" / "c1.csv").write_text(csv_text())
    bad = os.fsencode(root) + b"/bad\xff\xfe"
    os.mkdir(bad)
    with open(bad + b"/c1.csv", "w") as f:
        f.write(csv_text())
    scan = scan_root(root)
    assert sorted(scan) == ["good"]
    (q,) = scan.problems
    assert q.kind == "bad_name" and "UTF-8" in q.problem
    assert "\\xff" in q.path and q.path.encode("utf-8")          # storable text, names the folder


@pytest.mark.parametrize("bad", ["__x", "zarr.json", "c\x07", ".hid", "c" * 250])
def test_bad_chain_names_are_reported_and_skipped(tmp_path, bad):
    run = tmp_path / "root" / "run1"
    run.mkdir(parents=True)
    (run / "ok.csv").write_text(csv_text())
    (run / f"{bad}.csv").write_text(csv_text())
    (run / "ok_npz").mkdir()
    scan = scan_root(tmp_path / "root")
    folder = scan["run1"]
    assert folder.csv_chains == {"ok": str(run / "ok.csv")} and folder.npz_chains == {"ok_npz": str(run / "ok_npz")}
    assert [q.kind for q in scan.problems] == ["bad_name"]
    assert q_name(scan.problems[0]) == f"{bad}.csv".replace("\x07", "\\x07")  # printable


def q_name(q: InputProblem) -> str:
    return os.path.basename(q.path)


def test_bad_chain_folder_names_are_reported(tmp_path):
    run = tmp_path / "root" / "run1"
    (run / "__meta").mkdir(parents=True)
    (run / ".cache").mkdir()
    os.mkdir(os.fsencode(run) + b"/c\xff")
    scan = scan_root(tmp_path / "root")
    assert scan["run1"].npz_chains == {}
    assert sorted(q.kind for q in scan.problems) == ["bad_name"] * 3


def test_name_rule_matches_the_store_and_adds_its_own():
    from chainvigil.storage.draws import check_name
    for name in ["", "a/b", "a\\b", "a\x00b", ".x", "__x"]:
        with pytest.raises(ValueError):
            check_name(name)
        assert name_problem(name) is not None
    for name in ["zarr.json", "a\x1fb", "x" * 201, "bad\udcff"]:
        check_name(name)                      # the store alone would take these
        assert name_problem(name) is not None
    assert name_problem("chain_1") is None and name_problem("модель-α") is None


# --------------------------------------------------------------------------------------------------
# links and special files


def test_symlink_loops_in_the_root_and_in_a_run_are_reported(tmp_path):
    root = tmp_path / "root"
    (root / "good").mkdir(parents=True)
    (root / "good" / "c1.csv").write_text(csv_text())
    os.symlink("self", root / "self")
    os.symlink("b", root / "a")
    os.symlink("a", root / "b")
    os.symlink("c2.csv", root / "good" / "c2.csv")
    scan = finishes(lambda: scan_root(root))
    assert sorted(scan) == ["good"] and scan["good"].csv_chains == {"c1": str(root / "good" / "c1.csv")}
    assert sorted((q_name(q), q.kind) for q in scan.problems) == [
        ("a", "link_loop"), ("b", "link_loop"), ("c2.csv", "link_loop"), ("self", "link_loop")]


def test_fifos_named_like_chain_files_are_reported_never_opened_by_the_scan(tmp_path):
    run = tmp_path / "root" / "run1"
    (run / "c3").mkdir(parents=True)
    (run / "c1.csv").write_text(csv_text())
    os.mkfifo(run / "c2.csv")
    os.mkfifo(run / "run.json")
    os.mkfifo(run / "c3" / "00000001.npz")
    np.savez(run / "c3" / "00000002.npz", loglik=np.ones((2, 2)))
    scan = finishes(lambda: scan_root(tmp_path / "root"))
    folder = scan["run1"]
    assert folder.csv_chains == {"c1": str(run / "c1.csv")} and folder.run_info is None
    assert sorted((q_name(q), q.kind) for q in scan.problems) == [
        ("00000001.npz", "not_regular"), ("c2.csv", "not_regular"), ("run.json", "not_regular")]
    assert pending_chunks(run / "c3", set()) == ["00000002.npz"]


@pytest.mark.parametrize("name", ["c.csv", "run.json", "00000001.npz"])
def test_readers_given_a_fifo_refuse_it_without_blocking(tmp_path, name):
    p = tmp_path / name
    os.mkfifo(p)
    read = {"c.csv": lambda: CsvChainReader(p).read_new(), "run.json": lambda: read_run_info(p),
            "00000001.npz": lambda: load_npz_chunk(p)}[name]
    with pytest.raises(InputProblem) as err:
        finishes(read)
    assert err.value.kind == "not_regular" and err.value.path == str(p) and "FIFO" in err.value.problem


def test_readers_given_a_socket_or_a_device_refuse_it(tmp_path):
    short = Path(tempfile.mkdtemp(dir="/tmp"))          # a socket path must be short
    try:
        sock_path = short / "c.csv"
        s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        s.bind(str(sock_path))
        try:
            with pytest.raises(InputProblem) as err:
                finishes(lambda: CsvChainReader(sock_path).read_new())
            assert err.value.kind in ("not_regular", "unreadable") and err.value.path == str(sock_path)
            scan = scan_root(short.parent, only=[short.name])
            assert [(q_name(q), q.kind) for q in scan[short.name].problems] == [("c.csv", "not_regular")]
        finally:
            s.close()
    finally:
        for f in short.iterdir():
            f.unlink()
        short.rmdir()
    with pytest.raises(InputProblem) as err:
        finishes(lambda: CsvChainReader("/dev/zero").read_new())     # endless if it were read
    assert err.value.kind == "not_regular" and "character device" in err.value.problem
    with pytest.raises(InputProblem) as err:
        finishes(lambda: load_npz_chunk("/dev/zero"))
    assert err.value.kind == "not_regular"


def test_open_regular_reads_a_regular_file_normally(tmp_path):
    p = tmp_path / "x"
    p.write_bytes(b"abc")
    with open_regular(p) as f:
        assert f.read() == b"abc"


# --------------------------------------------------------------------------------------------------
# NPZ archives


def npz_bytes(**arrays) -> bytes:
    buf = io.BytesIO()
    np.savez_compressed(buf, **arrays)
    return buf.getvalue()


def patch_member(data: bytes, member: str, *, flags: int | None = None, method: int | None = None) -> bytes:
    """Set the flag bits / compression method of one member in its local and central headers."""
    out = bytearray(data)
    with zipfile.ZipFile(io.BytesIO(data)) as zf:
        local = zf.getinfo(member).header_offset
    central = [i for i in range(len(out) - 4) if out[i:i + 4] == b"PK\x01\x02"]
    for pos in central:
        name_len = struct.unpack_from("<H", out, pos + 28)[0]
        if out[pos + 46: pos + 46 + name_len] == member.encode():
            if flags is not None:
                struct.pack_into("<H", out, pos + 8, flags)
            if method is not None:
                struct.pack_into("<H", out, pos + 10, method)
    if flags is not None:
        struct.pack_into("<H", out, local + 6, flags)
    if method is not None:
        struct.pack_into("<H", out, local + 8, method)
    return bytes(out)


def good_chunk(first_draw: int, draws: int = 3, n: int = 2) -> dict:
    ids = np.arange(first_draw, first_draw + draws)
    return {"loglik": -np.add.outer(ids, np.arange(n)).astype(float), "params": ids[:, None] * 0.5,
            "param_names": np.array(["mu"]), "draw": ids}


def read_folder(folder: Path):
    """Read every chunk of a folder in order: (draw ids of the good ones, problems of the bad ones)."""
    ids, problems = [], []
    last = None
    for name in pending_chunks(folder, set()):
        try:
            b = load_npz_chunk(folder / name, last_draw=last)
        except InputProblem as problem:
            problems.append(problem)
            continue
        ids += b.draw_ids.tolist()
        last = b.last_draw
    return ids, problems


def with_good_neighbours(tmp_path, bad: bytes) -> tuple[list, list]:
    folder = tmp_path / "c1"
    folder.mkdir()
    np.savez(folder / "00000001.npz", **good_chunk(1))
    (folder / "00000002.npz").write_bytes(bad)
    np.savez(folder / "00000003.npz", **good_chunk(4))
    return read_folder(folder)


def test_corrupt_deflate_stream(tmp_path):
    data = bytearray(npz_bytes(**good_chunk(100, draws=200, n=50)))
    with zipfile.ZipFile(io.BytesIO(bytes(data))) as zf:
        info = zf.getinfo("loglik.npy")
    start = info.header_offset + 30 + len(info.filename) + len(info.extra)
    for k in range(start + 20, start + 60):
        data[k] ^= 0x5A
    ids, problems = with_good_neighbours(tmp_path, bytes(data))
    assert ids == [1, 2, 3, 4, 5, 6]
    (q,) = problems
    assert q.kind == "corrupt_npz" and q.path.endswith("00000002.npz")


def test_encrypted_member_is_refused_before_reading(tmp_path):
    bad = patch_member(npz_bytes(**good_chunk(100)), "loglik.npy", flags=0x1)
    ids, problems = with_good_neighbours(tmp_path, bad)
    assert ids == [1, 2, 3, 4, 5, 6]
    assert [(q.kind, "encrypted" in q.problem) for q in problems] == [("bad_npz", True)]


def test_unknown_compression_method_is_refused(tmp_path):
    bad = patch_member(npz_bytes(**good_chunk(100)), "loglik.npy", method=99)
    ids, problems = with_good_neighbours(tmp_path, bad)
    assert ids == [1, 2, 3, 4, 5, 6]
    assert [(q.kind, "method 99" in q.problem) for q in problems] == [("bad_npz", True)]


def npy_with_header(shape, data: bytes = b"\0" * 64, descr="<f8") -> bytes:
    header = repr({"descr": descr, "fortran_order": False, "shape": tuple(shape)}).encode("latin1")
    header += b" " * (63 - (10 + len(header)) % 64) + b"\n"
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(header)) + header + data


def test_absurd_declared_shape_is_refused_without_allocating(tmp_path):
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("loglik.npy", npy_with_header((10**9, 10**5)))      # 800 TB declared
    ids, problems = with_good_neighbours(tmp_path, buf.getvalue())
    assert ids == [1, 2, 3, 4, 5, 6]
    (q,) = problems
    assert q.kind == "limit_exceeded" and "max_member_bytes" in q.problem and "(1000000000, 100000)" in q.problem


def test_zero_width_names_with_an_absurd_count_are_refused(tmp_path):
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("loglik.npy", npy_with_header((1, 1), data=b"\0" * 8))
        zf.writestr("params.npy", npy_with_header((1, 0), data=b""))
        zf.writestr("param_names.npy", npy_with_header((10**15,), data=b"", descr="<U0"))
    with pytest.raises(InputProblem) as err:
        finishes(lambda: load_npz_chunk(_write(tmp_path / "x.npz", buf.getvalue())))
    assert err.value.kind == "bad_npz" and "zero width" in err.value.problem


def test_declared_shape_larger_than_the_member_is_refused(tmp_path):
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("loglik.npy", npy_with_header((1000, 10)))          # 80 kB declared, 64 B present
    with pytest.raises(InputProblem) as err:
        load_npz_chunk(_write(tmp_path / "x.npz", buf.getvalue()))
    assert err.value.kind == "bad_npz" and "declares shape (1000, 10)" in err.value.problem


def _write(p: Path, data: bytes) -> Path:
    p.write_bytes(data)
    return p


def test_highly_compressed_member_is_refused_from_its_declared_size(tmp_path):
    # 32 MiB of zeros packs to about 32 kB; with a 4 MiB cap nothing is decompressed.
    data = npz_bytes(loglik=np.zeros((4096, 1024)))
    assert len(data) < 100_000
    limits = ReaderLimits(max_member_bytes=4 << 20)
    folder = tmp_path / "c1"
    folder.mkdir()
    (folder / "00000001.npz").write_bytes(data)
    np.savez(folder / "00000002.npz", **good_chunk(1))
    with pytest.raises(InputProblem) as err:
        load_npz_chunk(folder / "00000001.npz", limits=limits)
    assert err.value.kind == "limit_exceeded" and err.value.path == str(folder / "00000001.npz")
    assert load_npz_chunk(folder / "00000002.npz", limits=limits).draw_ids.tolist() == [1, 2, 3]


def test_lying_zip_size_with_a_large_stream_is_capped(tmp_path):
    # The zip entry says 200 bytes unpacked; the deflate stream holds 8 MB. Reading stops at the cap.
    payload = npy_with_header((1, 2), data=b"\0" * 16) + b"\0" * (8 << 20)
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("loglik.npy", payload)
    data = bytearray(buf.getvalue())
    with zipfile.ZipFile(io.BytesIO(bytes(data))) as zf:
        info = zf.getinfo("loglik.npy")
    true_size = info.file_size
    for pos in [i for i in range(len(data) - 4) if data[i:i + 4] == b"PK\x01\x02"]:
        struct.pack_into("<I", data, pos + 24, 144)
    struct.pack_into("<I", data, info.header_offset + 22, 144)
    assert true_size > 8 << 20
    with pytest.raises(InputProblem) as err:
        load_npz_chunk(_write(tmp_path / "x.npz", bytes(data)))
    assert err.value.kind == "corrupt_npz" and "checksum" in err.value.problem


def test_too_many_members(tmp_path):
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        for k in range(30):
            zf.writestr(f"a{k}.npy", b"")
    with pytest.raises(InputProblem) as err:
        load_npz_chunk(_write(tmp_path / "x.npz", buf.getvalue()), limits=ReaderLimits(max_npz_members=10))
    assert err.value.kind == "limit_exceeded" and "max_npz_members" in err.value.problem


# --------------------------------------------------------------------------------------------------
# CSV headers and rows


@pytest.mark.parametrize("line, words", [
    ("draw,loglik[1],loglik[1000000000]", "loglik[1000000000]"),
    ("loglik[1000000000]", "missing 1"),
    ("loglik[1]," + "loglik[" + "9" * 40 + "]", "digits"),
    ("loglik.1,loglik.99999999999", "loglik.99999999999"),
])
def test_huge_indices_are_refused_without_building_them(line, words):
    with pytest.raises(InputProblem) as err:
        parse_header(line, "/r/c.csv")
    assert err.value.kind == "bad_header" and words in err.value.problem and err.value.path == "/r/c.csv"


def test_too_many_columns_is_a_limit(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text(",".join(f"loglik[{i}]" for i in range(1, 101)) + "\n")
    with pytest.raises(InputProblem) as err:
        CsvChainReader(p, limits=ReaderLimits(max_columns=50)).read_new()
    assert err.value.kind == "limit_exceeded" and "max_columns" in err.value.problem and err.value.path == str(p)


def test_header_longer_than_the_limit(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text("loglik[1]," + "x" * 5000)        # no line end yet: waits while under the limit
    assert CsvChainReader(p, limits=ReaderLimits(max_header_bytes=10_000)).read_new().draws == 0
    with pytest.raises(InputProblem) as err:
        CsvChainReader(p, limits=ReaderLimits(max_header_bytes=1000)).read_new()
    assert err.value.kind == "limit_exceeded" and "max_header_bytes" in err.value.problem


def test_cr_only_line_ends_are_read(tmp_path):
    p = tmp_path / "c.csv"
    p.write_bytes(csv_text().replace("\n", "\r").encode())
    r = CsvChainReader(p)
    b = r.read_new()
    assert b.draw_ids.tolist() == [1, 2, 3] and b.problems == []
    np.testing.assert_array_equal(b.loglik, [[-1.1, -1.2], [-2.1, -2.2], [-3.1, -3.2]])
    with open(p, "ab") as f:
        f.write(b"4,2.0,-4.1,-4.2\r5,2.5,-5.1")             # the last line not finished
    b = r.read_new()
    assert b.draw_ids.tolist() == [4]
    with open(p, "ab") as f:
        f.write(b",-5.2\r")
    assert r.read_new().draw_ids.tolist() == [5]


def test_an_lf_in_a_file_of_lone_cr_line_ends_is_reported_after_the_good_lines(tmp_path):
    # docs/input-format.md: the first line end decides; a line ended by LF there would never count
    p = tmp_path / "c.csv"
    p.write_bytes(csv_text().replace("\n", "\r").encode())
    r = CsvChainReader(p)
    assert r.read_new().draw_ids.tolist() == [1, 2, 3]
    with open(p, "ab") as f:
        f.write(b"4,2.0,-4.1,-4.2\r5,2.5,-5.1,-5.2\n6,3.0,-6.1,-6.2\n")
    assert r.read_new().draw_ids.tolist() == [4]  # the lines before the LF are good
    with pytest.raises(InputProblem) as err:
        r.read_new()
    assert err.value.kind == "line_ends" and err.value.path == str(p)
    first_lf = p.read_bytes().index(b"\n")
    assert f"byte {first_lf} is an LF" in err.value.problem
    # a blank first line ended by a lone CR, then LF lines: reported, not waited on for ever
    q = tmp_path / "d.csv"
    q.write_bytes(b"\r" + csv_text().encode())
    with pytest.raises(InputProblem) as err:
        CsvChainReader(q).read_new()
    assert err.value.kind == "line_ends" and err.value.path == str(q)


def test_header_ending_in_a_lone_cr_waits_to_know_the_line_end(tmp_path):
    p = tmp_path / "c.csv"
    p.write_bytes(b"draw,loglik[1]\r")
    r = CsvChainReader(p)
    assert r.read_new().draws == 0 and r.header is None
    with open(p, "ab") as f:
        f.write(b"\n1,-1.5\r\n")
    assert r.read_new().loglik.tolist() == [[-1.5]]


def test_indented_comments_are_comments_before_and_after_the_header(tmp_path):
    p = tmp_path / "c.csv"
    text = csv_text().splitlines()
    p.write_text("\n".join(["   # sampler settings", "\t# seed=3", text[0], text[1], "  # adaptation done",
                            "\t#  step size 0.3", text[2], text[3]]) + "\n")
    b = CsvChainReader(p).read_new()
    assert b.draw_ids.tolist() == [1, 2, 3] and b.problems == []


def test_repeated_or_decreasing_draw_numbers_are_refused_and_later_draws_kept(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text(csv_text(draws=(1, 2, 3, 2, 4, 4, 3, 5)))
    r = CsvChainReader(p)
    b = r.read_new()
    assert b.draw_ids.tolist() == [1, 2, 3, 4, 5]
    np.testing.assert_array_equal(b.params[:, 0], [0.5, 1.0, 1.5, 2.0, 2.5])
    (q,) = b.problems
    assert q.kind == "draw_order" and q.path == str(p)
    assert "line 5 has draw 2 after draw 3" in q.problem and "line 7" in q.problem and "line 8" in q.problem
    assert b.end_position == 5 and r.last_draw == 5
    with open(p, "a") as f:
        f.write("5,9,9,9\n6,3.0,-6.1,-6.2\n")
    b = r.read_new()
    assert b.draw_ids.tolist() == [6] and b.problems[0].kind == "draw_order"


def test_draw_order_resumes_from_the_committed_last_draw(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text(csv_text(draws=(1, 2, 3)))
    first = CsvChainReader(p).read_new()
    with open(p, "a") as f:
        f.write("3,0,0,0\n4,2.0,-4.1,-4.2\n")
    r = CsvChainReader(p, offset=first.end_offset, header="draw,mu,loglik[1],loglik[2]",
                       position=first.end_position, last_draw=first.last_draw)
    b = r.read_new()
    assert b.draw_ids.tolist() == [4] and b.positions.tolist() == [3] and b.problems[0].kind == "draw_order"


def test_npz_draw_numbers_must_increase_across_chunks(tmp_path):
    folder = tmp_path / "c1"
    folder.mkdir()
    np.savez(folder / "00000001.npz", **good_chunk(1, draws=4))
    np.savez(folder / "00000002.npz", **good_chunk(3, draws=4))          # 3, 4 repeat; 5, 6 new
    a = load_npz_chunk(folder / "00000001.npz")
    b = load_npz_chunk(folder / "00000002.npz", position=a.end_position, last_draw=a.last_draw)
    assert b.draw_ids.tolist() == [5, 6] and b.positions.tolist() == [4, 5]
    assert [q.kind for q in b.problems] == ["draw_order"] and "00000002.npz" in b.problems[0].path


def test_nan_and_inf_in_a_parameter_column_are_kept_and_flagged(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text("draw,mu,loglik[1]\n1,nan,-1\n2,inf,-2\n3,-inf,-3\n4,0.5,-4\n")
    b = CsvChainReader(p).read_new()
    assert b.draws == 4 and np.isnan(b.params[0, 0]) and b.params[1, 0] == np.inf
    (q,) = b.problems
    assert q.kind == "bad_values" and "draw 1 (mu)" in q.problem and "draw 3 (mu)" in q.problem


def test_rewinding_the_offset_restores_position_and_last_draw(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text(csv_text(draws=(1, 2, 3)))
    r = CsvChainReader(p)
    b = r.read_new()
    assert (r.position, r.last_draw) == (3, 3)
    r.offset = b.start_offset                     # how the service takes back a refused batch
    assert (r.position, r.last_draw) == (0, None)
    again = r.read_new()
    assert again.draw_ids.tolist() == [1, 2, 3] and again.problems == []


# --------------------------------------------------------------------------------------------------
# run.json


def test_deeply_nested_run_info_is_a_limit_not_a_crash(tmp_path):
    p = tmp_path / "run.json"
    p.write_text('{"title": "t", "x": ' + "[" * 100_000 + "]" * 100_000 + "}")
    with pytest.raises(InputProblem) as err:
        read_run_info(p)
    assert err.value.kind == "limit_exceeded" and err.value.path == str(p)
    p.write_text('{"title": "t", "x": ' + "[" * 40 + "]" * 40 + "}")
    with pytest.raises(InputProblem) as err:
        read_run_info(p)
    assert err.value.kind == "limit_exceeded" and "max_json_depth" in err.value.problem


def test_run_info_larger_than_the_limit(tmp_path):
    p = tmp_path / "run.json"
    p.write_text(json.dumps({"title": "x" * 5000}))
    with pytest.raises(InputProblem) as err:
        read_run_info(p, limits=ReaderLimits(max_run_info_bytes=1000))
    assert err.value.kind == "limit_exceeded" and "max_run_info_bytes" in err.value.problem
    assert read_run_info(p)["title"] == "x" * 5000


def test_run_info_with_many_bad_fields_keeps_the_good_ones(tmp_path):
    p = tmp_path / "run.json"
    p.write_text(json.dumps({"title": "ok", "observation_labels": [], "n_params": 2**63,
                             "point_loglik": -1e308, "targets": {"rhat": 1e308, "ess": 400, "x": 1e-200},
                             "warmup": "100", "thin": 2, "loglik": "log_lik"}))
    got = read_run_info(p)
    assert dict(got) == {"title": "ok", "targets": {"ess": 400}, "thin": 2, "loglik": "log_lik"}
    assert len(got.problems) == 6 and all(q.kind == "bad_run_info" and q.path == str(p) for q in got.problems)
    words = " ".join(q.problem for q in got.problems)
    for field in ("'observation_labels'", "'n_params'", "'point_loglik'", "'rhat'", "'x'", "'warmup'"):
        assert field in words


# --------------------------------------------------------------------------------------------------
# the service's scan over a hostile root


def test_service_scan_over_a_hostile_root_records_events_and_keeps_the_good_draws(tmp_path):
    from chainvigil.service import Service
    root = tmp_path / "root"
    for name in ("good", "__x", "fifo_run"):
        (root / name).mkdir(parents=True)
    (root / "good" / "c1.csv").write_text(csv_text(draws=(1, 2, 2, 3)))
    (root / "__x" / "c1.csv").write_text(csv_text())
    os.mkfifo(root / "fifo_run" / "c1.csv")
    os.mkfifo(root / "fifo_run" / "run.json")
    os.symlink("self", root / "self")
    (root / "good" / "c2.csv").write_text("draw,loglik[1000000000]\n")
    service = Service(root, tmp_path / "state")
    try:
        finishes(service.scan)
        service.ingest.commit_pending()
        kinds = {(e["kind"], os.path.basename(e["file"] or "")) for e in service.history.events()}
        assert {("bad_name", "__x"), ("not_regular", "c1.csv"), ("not_regular", "run.json"),
                ("link_loop", "self"), ("draw_order", "c1.csv"), ("bad_header", "c2.csv")} <= kinds
        assert service.store.length("good", "c1") == 3
    finally:
        service.close()
