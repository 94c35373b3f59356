"""Saving and loading a whole learner; every damaged file refused for the right reason;
the same seed giving bit-identical training."""
from __future__ import annotations

import io
import json
import zipfile

import numpy as np
import pytest

from nets import (SGD, Adam, Loss, Network, RunningScaler, StateFileError, Window,
                  load_bundle, read_state, save_bundle, train_step)
from nets.store import HEADER_KEY

N_IN = 5


class Learner:
    """The parts the daemon keeps for one model, built from a seed."""

    def __init__(self, seed: int, hidden=(12, 8), optimizer: str = "adam",
                 activation: str = "tanh", dtype: str = "float64") -> None:
        self.net = Network(N_IN, list(hidden), activation, rng=np.random.default_rng(seed),
                           dtype=dtype)
        size = self.net.params.size
        self.opt = (Adam(size, 0.01, dtype=dtype) if optimizer == "adam"
                    else SGD(size, 0.05, momentum=0.9, nesterov=True, dtype=dtype))
        self.xs, self.ys = RunningScaler(N_IN, dtype), RunningScaler(1, dtype)
        self.window = Window(256, N_IN, 1, dtype)
        self.loss = Loss("huber", delta=1.0)

    @property
    def parts(self):
        return {"opt": self.opt, "xscale": self.xs, "yscale": self.ys, "window": self.window}

    def learn(self, x: np.ndarray, y: float, rng: np.random.Generator) -> None:
        self.xs.update(x)
        self.ys.update(np.array([y]))
        self.window.add(x, y)
        if len(self.window) >= 16:
            bx, by = self.window.sample(16, rng, mode="recent")
            train_step(self.net, self.opt, self.xs.transform(bx, clip=6.0),
                       self.ys.transform(by), self.loss, weight_decay=1e-4, clip_norm=5.0)

    def predict(self, x: np.ndarray) -> np.ndarray:
        return self.ys.inverse(self.net.predict(self.xs.transform(x, clip=6.0)))


def pump_rows(n: int, seed: int = 0):
    """Pump-station-like readings: speed, flow, current, ambient and bearing temperature."""
    rng = np.random.default_rng(seed)
    speed = 1450 + 50 * rng.normal(size=n)
    flow = 0.008 * speed + rng.normal(0, 0.3, n)
    current = 0.01 * speed + 0.4 * flow + rng.normal(0, 0.2, n)
    ambient = 20 + 3 * rng.normal(size=n)
    bearing = 0.9 * ambient + 0.02 * speed + rng.normal(0, 0.5, n)
    x = np.column_stack([speed, flow, current, ambient, np.sin(np.arange(n) / 50)])
    return x, bearing


def trained(seed: int = 1, steps: int = 300, **kw) -> Learner:
    learner = Learner(seed, **kw)
    x, y = pump_rows(steps)
    rng = np.random.default_rng(seed + 100)
    for t in range(steps):
        learner.learn(x[t], y[t], rng)
    return learner


@pytest.mark.parametrize("optimizer", ["adam", "sgd"])
def test_save_load_gives_identical_predictions_and_next_step(tmp_path, optimizer):
    a = trained(optimizer=optimizer)
    path = str(tmp_path / "model.npz")
    save_bundle(path, a.net, a.parts, meta={"model": "bearing_temp"})
    b = Learner(seed=77, optimizer=optimizer)          # different initial weights
    assert not np.array_equal(a.net.params, b.net.params)
    header, extra = load_bundle(path, b.net, b.parts)
    assert header["model"] == "bearing_temp" and extra == {}
    xq, _ = pump_rows(40, seed=5)
    np.testing.assert_array_equal(a.predict(xq), b.predict(xq))
    # the next training step, with the same random draws, lands on the same bits
    xn, yn = pump_rows(3, seed=6)
    ra, rb = np.random.default_rng(9), np.random.default_rng(9)
    for t in range(3):
        a.learn(xn[t], yn[t], ra)
        b.learn(xn[t], yn[t], rb)
    np.testing.assert_array_equal(a.net.params, b.net.params)
    for key, val in a.opt.state().items():
        np.testing.assert_array_equal(val, b.opt.state()[key])
    assert a.opt.steps == b.opt.steps > 0


def test_save_to_a_file_object_and_unclaimed_parts(tmp_path):
    a = trained(steps=50)
    buf = io.BytesIO()
    save_bundle(buf, a.net, a.parts)
    buf.seek(0)
    b = Learner(seed=3)
    _, extra = load_bundle(buf, b.net, {"opt": b.opt})       # the caller skips three parts
    assert sorted(extra) == ["window", "xscale", "yscale"]
    np.testing.assert_array_equal(a.net.params, b.net.params)


# --- damaged and foreign files ------------------------------------------------------------

@pytest.fixture
def saved(tmp_path):
    learner = trained(steps=60)
    path = tmp_path / "model.npz"
    save_bundle(str(path), learner.net, learner.parts)
    return path


def reason_loading(path, learner: Learner | None = None) -> str:
    learner = learner or Learner(seed=5)
    before = learner.net.params.copy()
    with pytest.raises(StateFileError) as info:
        load_bundle(str(path), learner.net, learner.parts)
    # a refused file leaves the target untouched
    np.testing.assert_array_equal(learner.net.params, before)
    assert info.value.reason in str(info.value)
    return info.value.reason


def rewrite(path, members: dict[str, np.ndarray]) -> None:
    """Write members back as a plain npz (header member included as given)."""
    np.savez(str(path), **members)


def members_of(path) -> dict[str, np.ndarray]:
    with np.load(str(path)) as npz:
        return {k: npz[k] for k in npz.files}


@pytest.mark.parametrize("other", [dict(hidden=(12, 9)), dict(hidden=(12,)),
                                   dict(activation="relu"), dict(dtype="float32")])
def test_different_architecture_is_refused_as_shape(saved, other):
    assert reason_loading(saved, Learner(seed=5, **other)) == "shape"


def test_a_part_with_other_channels_is_refused_as_shape(saved):
    learner = trained(seed=8, steps=40)
    learner.window = Window(256, N_IN + 1, 1)     # the net and optimiser would fit, this not
    before = {name: obj.state() for name, obj in learner.parts.items()}
    assert reason_loading(saved, learner) == "shape"
    # all or nothing: the optimiser and scalers loaded before the window are put back
    for name, obj in learner.parts.items():
        for key, arr in obj.state().items():
            np.testing.assert_array_equal(arr, before[name][key], err_msg=f"{name}/{key}")


def test_a_missing_part_is_refused_as_shape(tmp_path):
    a = trained(steps=30)
    path = tmp_path / "model.npz"
    save_bundle(str(path), a.net, {"opt": a.opt})
    assert reason_loading(path) == "shape"


def test_unknown_format_version(saved):
    m = members_of(saved)
    header = json.loads(m[HEADER_KEY].tobytes().decode())
    header["format_version"] = 99
    m[HEADER_KEY] = np.frombuffer(json.dumps(header).encode(), np.uint8)
    rewrite(saved, m)
    assert reason_loading(saved) == "version"


def test_changed_array_under_the_old_header_fails_the_checksum(saved):
    m = members_of(saved)
    m["net/params"] = m["net/params"].copy()
    m["net/params"][3] += 1e-9
    rewrite(saved, m)                  # a valid zip, a valid header, a wrong payload
    assert reason_loading(saved) == "checksum"


def test_flipped_byte_in_the_stored_payload(saved):
    raw = bytearray(saved.read_bytes())
    params = members_of(saved)["net/params"]
    at = bytes(raw).find(params.tobytes())
    assert at > 0, "npz members are stored uncompressed, so the bytes are findable"
    raw[at + 8 * 5 + 3] ^= 0x10
    saved.write_bytes(bytes(raw))
    # zip's own CRC-32 usually notices first ('truncated' = damaged archive); had it not,
    # the header's SHA-256 would ('checksum')
    assert reason_loading(saved) in ("checksum", "truncated")


@pytest.mark.parametrize("keep", [0.5, 0.9, 30])
def test_truncated_file(saved, keep):
    raw = saved.read_bytes()
    n = int(len(raw) * keep) if keep < 1 else keep
    saved.write_bytes(raw[:n])
    assert reason_loading(saved) == "truncated"


def test_pickled_object_array_is_refused(saved):
    m = members_of(saved)
    m["window/x"] = np.array([{"speed": 1450.0}, "oops"], dtype=object)
    np.savez(str(saved), allow_pickle=True, **m)
    assert reason_loading(saved) == "pickle"


@pytest.mark.parametrize("content", [b"speed,flow\n1450,11.2\n", b"", b"\x00" * 64])
def test_file_that_is_not_npz(tmp_path, content):
    path = tmp_path / "model.npz"
    path.write_bytes(content)
    assert reason_loading(path) == "not-npz"


def test_single_npy_array_is_not_npz(tmp_path):
    path = tmp_path / "model.npy"
    np.save(str(path), np.arange(4.0))
    assert reason_loading(path) == "not-npz"


def test_missing_file(tmp_path):
    assert reason_loading(tmp_path / "nowhere.npz") == "missing"


def test_npz_without_header(tmp_path):
    path = tmp_path / "plain.npz"
    np.savez(str(path), params=np.zeros(3))
    assert reason_loading(path) == "header"


def test_written_file_is_a_plain_zip_of_npy_members(saved):
    with zipfile.ZipFile(saved) as z:
        names = set(z.namelist())
    assert f"{HEADER_KEY}.npy" in names and "net/params.npy" in names
    arrays, header = read_state(str(saved))
    assert header["format_version"] == 1 and header["architecture"] == "5-12-8-1 tanh regression"


# --- determinism ----------------------------------------------------------------------------

def run_500_steps(seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    net = Network(8, [32, 32], "tanh", rng=rng)
    opt = Adam(net.params.size, 0.003)
    window = Window(512, 8, 1)
    window.add_many(rng.normal(size=(512, 8)), rng.normal(size=(512, 1)))
    loss = Loss("squared")
    for step in range(500):
        bx, by = window.sample(32, rng, mode="recent" if step % 2 else "uniform")
        train_step(net, opt, bx, by, loss, weight_decay=1e-4, clip_norm=1.0)
    return net.params.copy()


def test_same_seed_gives_bit_identical_training():
    first, second = run_500_steps(42), run_500_steps(42)
    assert np.array_equal(first, second)
    assert not np.array_equal(first, run_500_steps(43))
