"""Identity of inputs: a rewritten, shrunk or regrown CSV, an NPZ chunk read mid-write, unreadable
for a while, rewritten after it was taken, or its name reused by a restarted sampler.

Each case asserts that the service keeps running (``cycle`` returns), that an event names the file
and the problem, and that the store equals the files draw for draw (nothing lost, nothing counted
twice, no chain mixing two sampler runs' draws).  Real files, a real zarr store and SQLite history;
the service is restarted on the same state where a restart could go wrong.
"""
from __future__ import annotations

import os

import numpy as np
import pytest

from chainvigil.service import Service
from chainvigil.writer import ChainWriter

N = 5


def draws(rng, k):
    """k draws of a normal model: (loglik (k, N), mu (k, 1))."""
    y = np.linspace(-1, 1, N)
    mu = rng.normal(0, 0.4, size=(k, 1))
    return -0.5 * np.log(2 * np.pi) - 0.5 * (y - mu) ** 2, mu


def file_bytes(tmp_path, ll, mu, fmt="csv"):
    """The bytes the public writer produces for these draws (one CSV file, or NPZ chunks)."""
    scratch = tmp_path / f"scratch-{os.urandom(4).hex()}"
    with ChainWriter(scratch, "x", param_names=("mu",), fmt=fmt) as writer:
        writer.append(ll, mu)
    if fmt == "csv":
        return (scratch / "x.csv").read_bytes()
    return (sorted((scratch / "x").glob("*.npz"))[0]).read_bytes()


def chunk_bytes(tmp_path, ll, mu, first_draw):
    scratch = tmp_path / f"scratch-{os.urandom(4).hex()}"
    with ChainWriter(scratch, "x", param_names=("mu",), fmt="npz") as writer:
        writer.append(ll, mu, draw_ids=np.arange(first_draw, first_draw + len(ll)))
    return (sorted((scratch / "x").glob("*.npz"))[0]).read_bytes()


def put_atomically(path, data: bytes):
    tmp = path.with_name("." + path.name + ".tmp")
    tmp.write_bytes(data)
    os.replace(tmp, path)


def assert_store_is(service, run, expected: dict):
    """The store holds exactly these chains, each with exactly these draws (loglik, mu) in order."""
    assert sorted(service.store.chains(run)) == sorted(expected), service.store.chains(run)
    for chain, (ll, mu) in expected.items():
        np.testing.assert_array_equal(service.store.read_loglik(run, chain), ll, err_msg=chain)
        np.testing.assert_array_equal(service.store.read_params(run, chain), mu, err_msg=chain)
        assert service.history.committed(run, chain)["draws"] == len(ll), chain


def event_about(service, kind, file_part):
    found = [e for e in service.history.events() if e["kind"] == kind and file_part in (e["file"] or "")
             and file_part in e["message"]]
    assert found, [(e["kind"], e["file"], e["message"]) for e in service.history.events()]
    return found


@pytest.fixture
def root(tmp_path):
    r = tmp_path / "root"
    (r / "r").mkdir(parents=True)
    return r


def service_on(root):
    return Service(root, every=0.0)


# ---------------------------------------------------------------------------------------- CSV

def test_csv_rewritten_in_place_same_length_is_a_new_segment(root, tmp_path):
    rng = np.random.default_rng(1)
    a_ll, a_mu = draws(rng, 40)
    path = root / "r" / "a.csv"
    path.write_bytes(file_bytes(tmp_path, a_ll, a_mu))
    service = service_on(root)
    service.cycle(force=True)
    perm = rng.permutation(40)  # the same numbers in another order: a file of exactly the same length
    b_ll, b_mu = a_ll[perm], a_mu[perm]
    new = file_bytes(tmp_path, b_ll, b_mu)
    assert len(new) == path.stat().st_size
    inode = path.stat().st_ino
    path.write_bytes(new)  # truncated and written again: same inode
    assert path.stat().st_ino == inode
    service.cycle(force=True)
    event_about(service, "rewritten", "a.csv")
    assert_store_is(service, "r", {"a": (a_ll, a_mu), "a~2": (b_ll, b_mu)})
    service.close()
    again = service_on(root)  # a restart neither reads the file again nor mixes the segments
    again.cycle(force=True)
    assert_store_is(again, "r", {"a": (a_ll, a_mu), "a~2": (b_ll, b_mu)})
    again.close()


def test_csv_rewritten_longer_by_a_restarted_sampler_is_a_new_segment(root, tmp_path):
    rng = np.random.default_rng(2)
    a_ll, a_mu = draws(rng, 30)
    path = root / "r" / "a.csv"
    path.write_bytes(file_bytes(tmp_path, a_ll, a_mu))
    service = service_on(root)
    service.cycle(force=True)
    b_ll, b_mu = draws(rng, 55)
    put_atomically(path, file_bytes(tmp_path, b_ll, b_mu))  # same header, longer, new inode
    service.cycle(force=True)
    event_about(service, "rewritten", "a.csv")
    assert_store_is(service, "r", {"a": (a_ll, a_mu), "a~2": (b_ll, b_mu)})
    service.close()


def test_csv_replaced_by_a_copy_of_the_same_bytes_is_followed_not_doubled(root, tmp_path):
    rng = np.random.default_rng(3)
    a_ll, a_mu = draws(rng, 30)
    path = root / "r" / "a.csv"
    path.write_bytes(file_bytes(tmp_path, a_ll, a_mu))
    service = service_on(root)
    service.cycle(force=True)
    more_ll, more_mu = draws(rng, 10)
    both = (np.concatenate([a_ll, more_ll]), np.concatenate([a_mu, more_mu]))
    put_atomically(path, file_bytes(tmp_path, *both))  # a whole-file re-dump through a rename
    service.cycle(force=True)
    assert not [e for e in service.history.events() if e["kind"] == "rewritten"]
    assert_store_is(service, "r", {"a": both})
    service.close()


def test_csv_shrunk_is_a_new_segment_read_from_its_start(root, tmp_path):
    rng = np.random.default_rng(4)
    a_ll, a_mu = draws(rng, 40)
    path = root / "r" / "a.csv"
    path.write_bytes(file_bytes(tmp_path, a_ll, a_mu))
    service = service_on(root)
    service.cycle(force=True)
    b_ll, b_mu = draws(rng, 12)  # a restarted sampler, not as far yet
    path.write_bytes(file_bytes(tmp_path, b_ll, b_mu))
    service.cycle(force=True)
    event = event_about(service, "rewritten", "a.csv")
    assert "shorter than" in event[-1]["message"]
    assert_store_is(service, "r", {"a": (a_ll, a_mu), "a~2": (b_ll, b_mu)})
    service.close()


def test_csv_shrunk_and_regrown_from_a_checkpoint_counts_nothing_twice(root, tmp_path):
    """Cut back to draw 10 (a sampler resumed from its checkpoint) and grown past the old end: the
    ten draws kept are already in chain 'a'; the new continuation becomes 'a~2'."""
    rng = np.random.default_rng(5)
    a_ll, a_mu = draws(rng, 40)
    path = root / "r" / "a.csv"
    path.write_bytes(file_bytes(tmp_path, a_ll, a_mu))
    service = service_on(root)
    service.cycle(force=True)
    lines = path.read_bytes().splitlines(keepends=True)
    path.write_bytes(b"".join(lines[:11]))  # header + 10 draws: shrunk ...
    service.cycle(force=True)
    event_about(service, "rewritten", "a.csv")
    assert_store_is(service, "r", {"a": (a_ll, a_mu), "a~2": (a_ll[:0], a_mu[:0])}
                    if "a~2" in service.store.chains("r") else {"a": (a_ll, a_mu)})
    c_ll, c_mu = draws(rng, 50)  # ... and regrown with a new continuation, longer than before
    with ChainWriter(root / "r", "a", param_names=("mu",), fmt="csv") as writer:
        writer.append(c_ll, c_mu, draw_ids=np.arange(11, 61))
    assert path.stat().st_size > len(b"".join(lines))
    service.cycle(force=True)
    assert_store_is(service, "r", {"a": (a_ll, a_mu), "a~2": (c_ll, c_mu)})
    service.close()
    again = service_on(root)
    again.cycle(force=True)
    assert_store_is(again, "r", {"a": (a_ll, a_mu), "a~2": (c_ll, c_mu)})
    again.close()


def test_csv_shrunk_and_regrown_between_two_passes_is_caught(root, tmp_path):
    rng = np.random.default_rng(6)
    a_ll, a_mu = draws(rng, 20)
    path = root / "r" / "a.csv"
    path.write_bytes(file_bytes(tmp_path, a_ll, a_mu))
    service = service_on(root)
    service.cycle(force=True)
    b_ll, b_mu = draws(rng, 26)  # truncated and written again before the service looked
    with open(path, "r+b") as f:
        f.truncate(0)
        f.write(file_bytes(tmp_path, b_ll, b_mu))
    service.cycle(force=True)
    event_about(service, "rewritten", "a.csv")
    assert_store_is(service, "r", {"a": (a_ll, a_mu), "a~2": (b_ll, b_mu)})
    service.close()


def test_a_csv_chain_whose_first_piece_has_no_draws_survives_a_restart(root, tmp_path):
    rng = np.random.default_rng(7)
    path = root / "r" / "a.csv"
    path.write_bytes(b"draw,mu,loglik[1],loglik[2],loglik[3],loglik[4],loglik[5]\n1,x,1,2,3,4,5\n")
    service = service_on(root)
    service.cycle(force=True)
    assert service.store.length("r", "a") == 0
    service.close()
    again = service_on(root)
    again.cycle(force=True)
    ll, mu = draws(rng, 8)
    with open(path, "ab") as f:
        for i in range(8):
            f.write((",".join([str(i + 2), repr(float(mu[i, 0]))] + [repr(float(v)) for v in ll[i]]) + "\n").encode())
    again.cycle(force=True)
    assert not [e for e in again.history.events() if "already read" in e["message"]]
    assert_store_is(again, "r", {"a": (ll, mu)})
    again.close()


# ---------------------------------------------------------------------------------------- NPZ

def test_npz_chunk_read_mid_write_is_taken_once_complete(root, tmp_path):
    rng = np.random.default_rng(11)
    (root / "r" / "c").mkdir()
    a_ll, a_mu = draws(rng, 20)
    b_ll, b_mu = draws(rng, 15)
    first, second = chunk_bytes(tmp_path, a_ll, a_mu, 1), chunk_bytes(tmp_path, b_ll, b_mu, 21)
    (root / "r" / "c" / "00000001.npz").write_bytes(second)
    chunk = root / "r" / "c" / "00000000.npz"
    chunk.write_bytes(first[: len(first) // 3])  # a writer without rename, part way
    service = service_on(root)
    service.cycle(force=True)
    event_about(service, "truncated_npz", "00000000.npz")
    assert service.store.length("r", "c") == 0  # not taken; the later chunk waits behind it
    assert service.history.manifest("r") == []  # and nothing recorded as taken
    with open(chunk, "ab") as f:  # the writer goes on
        f.write(first[len(first) // 3:])
    service.cycle(force=True)
    assert_store_is(service, "r", {"c": (np.concatenate([a_ll, b_ll]), np.concatenate([a_mu, b_mu]))})
    service.close()


def test_npz_chunk_unreadable_then_replaced_whole_is_taken(root, tmp_path):
    rng = np.random.default_rng(12)
    (root / "r" / "c").mkdir()
    a_ll, a_mu = draws(rng, 20)
    whole = chunk_bytes(tmp_path, a_ll, a_mu, 1)
    chunk = root / "r" / "c" / "00000000.npz"
    chunk.write_bytes(whole[:-40])  # a damaged zip (its directory cut short)
    service = service_on(root)
    for _ in range(2):  # tried, and not tried again while the bytes are the same
        service.cycle(force=True)
    event_about(service, "truncated_npz", "00000000.npz")
    assert service.store.length("r", "c") == 0
    service.close()
    again = service_on(root)  # a restart does not think it was taken
    again.cycle(force=True)
    assert again.store.length("r", "c") == 0
    put_atomically(chunk, whole)
    again.cycle(force=True)
    assert_store_is(again, "r", {"c": (a_ll, a_mu)})
    again.close()


def test_npz_chunk_rewritten_after_it_was_taken_is_a_new_segment(root, tmp_path):
    rng = np.random.default_rng(13)
    (root / "r" / "c").mkdir()
    a_ll, a_mu = draws(rng, 20)
    b_ll, b_mu = draws(rng, 20)
    c_ll, c_mu = draws(rng, 20)
    put_atomically(root / "r" / "c" / "00000000.npz", chunk_bytes(tmp_path, a_ll, a_mu, 1))
    put_atomically(root / "r" / "c" / "00000001.npz", chunk_bytes(tmp_path, b_ll, b_mu, 21))
    service = service_on(root)
    service.cycle(force=True)
    put_atomically(root / "r" / "c" / "00000001.npz", chunk_bytes(tmp_path, c_ll, c_mu, 21))
    service.cycle(force=True)
    event_about(service, "rewritten", "00000001.npz")
    expected = {"c": (np.concatenate([a_ll, b_ll]), np.concatenate([a_mu, b_mu])), "c~2": (c_ll, c_mu)}
    assert_store_is(service, "r", expected)
    service.cycle(force=True)
    service.close()
    again = service_on(root)
    again.cycle(force=True)
    assert_store_is(again, "r", expected)
    again.close()


def test_npz_chunk_touched_without_new_content_is_not_taken_again(root, tmp_path):
    rng = np.random.default_rng(14)
    (root / "r" / "c").mkdir()
    a_ll, a_mu = draws(rng, 20)
    chunk = root / "r" / "c" / "00000000.npz"
    put_atomically(chunk, chunk_bytes(tmp_path, a_ll, a_mu, 1))
    service = service_on(root)
    service.cycle(force=True)
    put_atomically(chunk, chunk.read_bytes())  # the same bytes, a new inode and time
    service.cycle(force=True)
    assert not [e for e in service.history.events() if e["kind"] == "rewritten"]
    assert_store_is(service, "r", {"c": (a_ll, a_mu)})
    service.close()


def test_npz_names_reused_by_a_restarted_sampler(root, tmp_path):
    """Run A wrote chunks 0-2; the sampler restarts and writes 0, 1 (new content), then 2, 3."""
    rng = np.random.default_rng(15)
    folder = root / "r" / "c"
    folder.mkdir()
    a = [draws(rng, 10) for _ in range(3)]
    b = [draws(rng, 10) for _ in range(4)]
    for i, (ll, mu) in enumerate(a):
        put_atomically(folder / f"{i:08d}.npz", chunk_bytes(tmp_path, ll, mu, 10 * i + 1))
    service = service_on(root)
    service.cycle(force=True)
    for i in (0, 1):
        put_atomically(folder / f"{i:08d}.npz", chunk_bytes(tmp_path, *b[i], 10 * i + 1))
    service.cycle(force=True)
    event_about(service, "rewritten", "00000000.npz")
    cat = lambda parts: (np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts]))  # noqa: E731
    assert_store_is(service, "r", {"c": cat(a), "c~2": cat(b[:2])})  # the old chunk 2 is not taken again
    service.close()
    again = service_on(root)  # restarted between the two halves of the reuse
    again.cycle(force=True)
    assert_store_is(again, "r", {"c": cat(a), "c~2": cat(b[:2])})
    for i in (2, 3):
        put_atomically(folder / f"{i:08d}.npz", chunk_bytes(tmp_path, *b[i], 10 * i + 1))
    again.cycle(force=True)
    event_about(again, "chunk_reused", "00000002.npz")
    assert_store_is(again, "r", {"c": cat(a), "c~2": cat(b)})
    again.close()


def test_an_npz_chain_whose_first_chunk_is_half_written_survives_a_restart(root, tmp_path):
    rng = np.random.default_rng(16)
    (root / "r" / "c").mkdir()
    ll, mu = draws(rng, 10)
    whole = chunk_bytes(tmp_path, ll, mu, 1)
    chunk = root / "r" / "c" / "00000000.npz"
    chunk.write_bytes(whole[:100])
    service = service_on(root)
    service.cycle(force=True)
    service.close()
    again = service_on(root)
    again.cycle(force=True)
    chunk.write_bytes(whole)
    again.cycle(force=True)
    assert not [e for e in again.history.events() if "already read" in e["message"]]
    assert_store_is(again, "r", {"c": (ll, mu)})
    again.close()


def test_csv_rewritten_while_it_is_being_read_is_not_mixed(root, tmp_path, monkeypatch):
    """The file is rewritten between the identity check and the end of the read: the lines read are
    dropped (the run restored from the commit log), and the new file becomes 'a~2' afterwards."""
    import chainvigil.ingest as ingest_module
    rng = np.random.default_rng(21)
    a_ll, a_mu = draws(rng, 30)
    path = root / "r" / "a.csv"
    path.write_bytes(file_bytes(tmp_path, a_ll, a_mu))
    service = service_on(root)
    service.cycle(force=True)
    more_ll, more_mu = draws(rng, 10)
    with ChainWriter(root / "r", "a", param_names=("mu",), fmt="csv") as writer:
        writer.append(more_ll, more_mu)
    b_ll, b_mu = draws(rng, 60)
    original = ingest_module.CsvChainReader.read_new

    def read_then_rewritten(self, *args, **kwargs):
        batch = original(self, *args, **kwargs)
        put_atomically(path, file_bytes(tmp_path, b_ll, b_mu))  # a restarted sampler, this instant
        return batch

    monkeypatch.setattr(ingest_module.CsvChainReader, "read_new", read_then_rewritten)
    service.cycle(force=True)
    monkeypatch.setattr(ingest_module.CsvChainReader, "read_new", original)
    assert_store_is(service, "r", {"a": (a_ll, a_mu)})  # the lines read meanwhile are not kept
    (root / "r" / "note.txt").write_text("the folder changes as the sampler writes")
    service.cycle(force=True)
    event_about(service, "rewritten", "a.csv")
    assert_store_is(service, "r", {"a": (a_ll, a_mu), "a~2": (b_ll, b_mu)})
    service.close()


def test_a_file_named_like_a_later_segment_is_not_mixed_into_it(root, tmp_path):
    # a.csv rewritten: its new content is chain 'a~2'; a user file 'a~2.csv' written later must not
    # be read into that chain
    rng = np.random.default_rng(7)
    a_ll, a_mu = draws(rng, 40)
    path = root / "r" / "a.csv"
    path.write_bytes(file_bytes(tmp_path, a_ll, a_mu))
    service = service_on(root)
    service.cycle(force=True)
    b_ll, b_mu = draws(rng, 30)
    path.write_bytes(file_bytes(tmp_path, b_ll, b_mu))
    service.cycle(force=True)
    event_about(service, "rewritten", "a.csv")
    c_ll, c_mu = draws(rng, 25)
    (root / "r" / "a~2.csv").write_bytes(file_bytes(tmp_path, c_ll, c_mu))
    for _ in range(2):
        service.cycle(force=True)
    event_about(service, "name_taken", "a~2.csv")
    assert_store_is(service, "r", {"a": (a_ll, a_mu), "a~2": (b_ll, b_mu)})
    service.close()
