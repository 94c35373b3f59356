"""Checkpoint files: atomic writes, ids, retention, pins, damaged files, refusals."""
from __future__ import annotations

import json
import os
import stat
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from daemon.checkpoints import ID_RE, CheckpointStore
from daemon.errors import CheckpointError
from nets.store import write_state

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


class Clock:
    def __init__(self, t: float = 1_796_120_100.0) -> None:   # 2026-12-01T10:15:00Z
        self.t = t

    def __call__(self) -> float:
        return self.t


class Log:
    def __init__(self) -> None:
        self.lines: list[tuple[str, str, dict]] = []

    def __call__(self, level: str, event: str, **fields) -> None:
        self.lines.append((level, event, fields))

    def events(self, event: str) -> list[dict]:
        return [f for _, e, f in self.lines if e == event]


def state(seed: int = 0) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    return {"net/w": rng.normal(size=(3, 4)), "opt/step": np.array(7, dtype=np.int64),
            "window/x": rng.normal(size=(16, 3)).astype(np.float32)}


def store(tmp_path, keep: int = 5, clock=None, log=None) -> CheckpointStore:
    return CheckpointStore(str(tmp_path / "bearing_temp"), keep, clock or Clock(), log or Log())


def test_save_list_load_round_trip(tmp_path):
    clock = Clock()
    s = store(tmp_path, clock=clock)
    arrays = state()
    cid = s.save(arrays, {"samples": 1234, "loss": 0.25, "architecture": "3-32-1"})
    assert cid == "20261201T101500Z-000000"
    got, meta = s.load(cid)
    assert set(got) == set(arrays)
    for name, a in arrays.items():
        assert got[name].dtype == a.dtype and np.array_equal(got[name], a)
    assert meta["id"] == cid and meta["saved_at"] == clock.t and meta["samples"] == 1234
    [info] = s.list()
    assert (info.id, info.saved_at, info.samples, info.loss) == (cid, clock.t, 1234, 0.25)
    assert info.valid and info.problem is None and not info.pinned
    assert info.path == os.path.join(s.directory, cid + ".npz")
    assert stat.S_IMODE(os.stat(s.directory).st_mode) == 0o700


def test_ids_unique_within_a_second_and_sorted_across_restarts(tmp_path):
    clock = Clock()
    s = store(tmp_path, clock=clock)
    ids = [s.save(state(i), {"samples": i}) for i in range(3)]      # same second
    clock.t += 0.5
    ids.append(s.save(state(3), {"samples": 3}))
    assert len(set(ids)) == 4 and ids == sorted(ids)
    assert all(ID_RE.match(i) for i in ids)
    # A restart continues the sequence; a clock set back (no RTC before NTP) still sorts later.
    clock.t -= 3600
    again = store(tmp_path, clock=clock).save(state(9), {"samples": 9})
    assert again.endswith("-000004") and again > ids[-1]
    assert [i.id for i in s.list()] == sorted(ids + [again], reverse=True)
    assert s.newest_id() == again


def test_retention_keeps_newest_and_pinned(tmp_path):
    clock = Clock()
    s = store(tmp_path, keep=3, clock=clock)
    ids = []
    for i in range(4):
        clock.t += 60
        ids.append(s.save(state(i), {"samples": i}))
    assert [i.id for i in s.list()] == ids[:0:-1]                   # oldest pruned
    s.pin(ids[1])
    for i in range(4, 8):
        clock.t += 60
        ids.append(s.save(state(i), {"samples": i}))
    listed = s.list()
    assert [i.id for i in listed] == [ids[7], ids[6], ids[5], ids[1]]
    assert [i.pinned for i in listed] == [False, False, False, True]
    assert s.pinned() == {ids[1]}
    s.unpin(ids[1])
    clock.t += 60
    ids.append(s.save(state(8), {"samples": 8}))
    assert [i.id for i in s.list()] == [ids[8], ids[7], ids[6]]
    with pytest.raises(CheckpointError, match="no such checkpoint"):
        s.pin(ids[0])
    with pytest.raises(CheckpointError, match="not pinned"):
        s.unpin(ids[8])


def test_crash_leftovers_are_removed_on_open(tmp_path):
    s = store(tmp_path)
    cid = s.save(state(), {"samples": 1})
    leftover = os.path.join(s.directory, ".20261201T101600Z-000001.npz.tmp")
    pins_tmp = os.path.join(s.directory, ".pins.json.tmp")
    for p in (leftover, pins_tmp):
        with open(p, "wb") as f:
            f.write(b"PK\x03\x04half")
    log = Log()
    s2 = store(tmp_path, log=log)
    assert not os.path.exists(leftover) and not os.path.exists(pins_tmp)
    assert [i.id for i in s2.list()] == [cid]
    assert len(log.events("checkpoint_temp_removed")) == 2


def _flip_byte_in(path: str, needle: bytes) -> None:
    with open(path, "rb") as f:
        raw = bytearray(f.read())
    at = raw.index(needle)
    raw[at] ^= 0x10
    with open(path, "wb") as f:
        f.write(raw)


def test_truncated_and_bit_flipped_files_are_skipped(tmp_path):
    clock = Clock()
    log = Log()
    s = store(tmp_path, clock=clock, log=log)
    good = s.save(state(0), {"samples": 100})
    clock.t += 1
    flipped = s.save({"net/w": np.arange(64.0)}, {"samples": 200})
    clock.t += 1
    cut = s.save(state(2), {"samples": 300})
    _flip_byte_in(os.path.join(s.directory, flipped + ".npz"), np.float64(33.0).tobytes())
    path = os.path.join(s.directory, cut + ".npz")
    os.truncate(path, os.path.getsize(path) // 2)

    found = s.load_newest(lambda meta, arrays: None)
    assert found is not None
    cid, arrays, meta = found
    assert cid == good and meta["samples"] == 100
    assert np.array_equal(arrays["net/w"], state(0)["net/w"])
    assert s.skipped_corrupt == 2
    assert [e["id"] for e in log.events("checkpoint_skipped")] == [cut, flipped]
    by_id = {i.id: i for i in s.list()}
    assert by_id[good].valid and not by_id[cut].valid and not by_id[flipped].valid
    assert "cut short" in by_id[cut].problem
    assert "damaged" in by_id[flipped].problem
    with pytest.raises(CheckpointError, match=f"checkpoint {cut} is unusable"):
        s.load(cut)


def test_checksum_mismatch_is_skipped(tmp_path):
    # A well-formed archive whose header checksum belongs to other arrays.
    s = store(tmp_path)
    good = s.save(state(0), {"samples": 1})
    bad = "20261201T101501Z-000001"
    fake = os.path.join(s.directory, bad + ".npz")
    write_state(fake, state(1), {"id": bad, "saved_at": 1.0})
    with np.load(fake) as npz:
        members = {k: npz[k] for k in npz.files}
    members["net/w"] = members["net/w"] + 1.0
    np.savez(fake, **members)
    assert s.load_newest(lambda meta, arrays: None)[0] == good
    assert s.skipped_corrupt == 1
    with pytest.raises(CheckpointError, match="checksum"):
        s.load(bad)


def test_a_directory_in_place_of_a_checkpoint_is_called_a_directory(tmp_path):
    s = store(tmp_path)
    good = s.save(state(0), {"samples": 1})
    odd = "20261201T101501Z-000001"
    os.mkdir(os.path.join(s.directory, odd + ".npz"))
    assert s.load_newest(lambda meta, arrays: None)[0] == good
    with pytest.raises(CheckpointError, match="is a directory, not a checkpoint file"):
        s.load(odd)
    (listed,) = [c for c in s.list() if c.id == odd]
    assert not listed.valid and "is a directory" in listed.problem


def test_pickled_object_arrays_are_refused(tmp_path):
    s = store(tmp_path)
    with pytest.raises(CheckpointError, match="Python objects"):
        s.save({"bad": np.array([{"a": 1}], dtype=object)}, {"samples": 1})
    assert s.list() == []
    good = s.save(state(), {"samples": 1})
    evil = "20261201T101501Z-000001"
    header = np.frombuffer(json.dumps({"id": evil}).encode(), dtype=np.uint8)
    np.savez(os.path.join(s.directory, evil + ".npz"), __header__=header,
             bad=np.array([{"a": 1}], dtype=object))
    with pytest.raises(CheckpointError, match="pickled"):
        s.load(evil)
    assert s.load_newest(lambda meta, arrays: None)[0] == good


def test_architecture_mismatch_is_reported_and_skipped(tmp_path):
    clock = Clock()
    s = store(tmp_path, clock=clock)
    old = s.save(state(0), {"architecture": "4-32-32-1"})
    clock.t += 1
    new = s.save(state(1), {"architecture": "3-32-1"})

    def accept(meta, arrays):
        arch = meta.get("architecture")
        return None if arch == "4-32-32-1" else f"architecture {arch} differs from config 4-32-32-1"

    cid, _, _ = s.load_newest(accept)
    assert cid == old
    assert s.mismatches == [(new, "architecture 3-32-1 differs from config 4-32-32-1")]
    assert s.skipped_corrupt == 0
    assert s.load_newest(lambda meta, arrays: "never") is None
    assert [m[0] for m in s.mismatches] == [new, old]


_FAILING_SAVE = textwrap.dedent("""
    import resource, signal, sys
    import numpy as np
    sys.path.insert(0, sys.argv[2])
    from daemon.checkpoints import CheckpointStore
    from daemon.errors import CheckpointError
    s = CheckpointStore(sys.argv[1], 5, log=lambda *a, **k: None)
    signal.signal(signal.SIGXFSZ, signal.SIG_IGN)        # get EFBIG instead of being killed
    resource.setrlimit(resource.RLIMIT_FSIZE, (4096, 4096))
    try:
        s.save({"w": np.zeros(100_000)}, {"samples": 2})
    except CheckpointError as exc:
        print(exc)
        sys.exit(3)
""")


def test_failed_save_raises_and_keeps_older_checkpoints(tmp_path):
    # RLIMIT_FSIZE stops a write even for root, where chmod 0o500 would not.
    s = store(tmp_path)
    first = s.save(state(), {"samples": 1})
    proc = subprocess.run([sys.executable, "-c", _FAILING_SAVE, s.directory, ROOT],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 3, proc.stderr
    assert "could not write" in proc.stdout and "File too large" in proc.stdout
    assert sorted(os.listdir(s.directory)) == [first + ".npz"]       # temp file removed
    arrays, meta = s.load(first)
    assert meta["samples"] == 1 and np.array_equal(arrays["net/w"], state()["net/w"])


def test_unsafe_or_unusable_directories_are_refused(tmp_path):
    open_dir = tmp_path / "shared"
    open_dir.mkdir()
    os.chmod(open_dir, 0o777)
    with pytest.raises(CheckpointError, match="writable by every user.*chmod o-w"):
        CheckpointStore(str(open_dir), 3, log=Log())
    (tmp_path / "afile").write_text("x")
    with pytest.raises(CheckpointError, match="cannot create state directory"):
        CheckpointStore(str(tmp_path / "afile" / "model"), 3, log=Log())
    with pytest.raises(CheckpointError, match="reserved"):
        store(tmp_path).save(state(), {"id": "mine"})


def test_unknown_id_lists_known_ones(tmp_path):
    s = store(tmp_path)
    cid = s.save(state(), {"samples": 1})
    with pytest.raises(CheckpointError, match=f"known: {cid}"):
        s.load("20200101T000000Z-000009")
    with pytest.raises(CheckpointError, match="no checkpoint"):
        s.load("../../etc/passwd")


def test_id_before_and_promote(tmp_path):
    clock = Clock(1000.0)
    s = store(tmp_path, clock=clock)
    a = s.save(state(0), {"samples": 10})
    clock.t = 2000.0
    b = s.save(state(1), {"samples": 20})
    assert s.id_before(1500.0) == a and s.id_before(2500.0) == b and s.id_before(1000.0) is None
    clock.t = 3000.0
    c = s.promote(a)
    assert s.newest_id() == c
    arrays, meta = s.load(c)
    assert meta["restored_from"] == a and meta["samples"] == 10 and meta["saved_at"] == 3000.0
    assert np.array_equal(arrays["net/w"], state(0)["net/w"])
