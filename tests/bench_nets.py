"""Throughput of the numpy network core beside scikit-learn and PyTorch, as a markdown table.

Run: python tests/bench_nets.py   (not collected by pytest; prints figures, asserts nothing)

Reference net 8 -> 32 -> 32 -> 1, tanh, float64, plain SGD, squared loss, trained on
pre-drawn batches so only the step itself is timed. Each figure is the median of several
repeats of a timed loop, all contenders interleaved within each repeat. PyTorch is optional
(CPU, one thread); install it by hand, it is not a dependency of edgeprop.
"""
from __future__ import annotations

import os
import platform
import statistics
import sys
import time
from typing import Callable

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from nets import SGD, Loss, Network, Window, train_step  # noqa: E402

SIZES = (8, 32, 32, 1)
LR = 0.01
REPEATS = 7
TARGET_SECONDS = 0.25          # length of one timed repeat
POOL = 64                      # distinct pre-drawn batches, cycled


Runner = Callable[[int], None]      # run(n) makes n calls of the thing measured


def calibrate(run: Runner, calls_hint: int) -> int:
    """Number of calls that takes about TARGET_SECONDS."""
    run(min(calls_hint, 50))                                   # warm caches and buffers
    t0 = time.perf_counter()
    run(calls_hint)
    dt = time.perf_counter() - t0
    return max(10, int(calls_hint * TARGET_SECONDS / max(dt, 1e-9)))


def interleaved(runners: dict[str, tuple[Runner, int]]) -> dict[str, list[float]]:
    """Seconds per call for each runner, one timed loop of each per repeat, in turn.

    Interleaving matters on a shared machine: a burst of load then hits every contender
    in the same repeat, and per-repeat ratios stay fair.
    """
    counts = {name: calibrate(run, hint) for name, (run, hint) in runners.items()}
    out: dict[str, list[float]] = {name: [] for name in runners}
    for _ in range(REPEATS):
        for name, (run, _) in runners.items():
            n = counts[name]
            t0 = time.perf_counter()
            run(n)
            out[name].append((time.perf_counter() - t0) / n)
    return out


def batches(batch: int, seed: int = 0) -> list[tuple[np.ndarray, np.ndarray]]:
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(POOL):
        x = rng.normal(size=(batch, SIZES[0]))
        y = np.sin(x[:, :1] + x[:, 1:2]) + 0.1 * rng.normal(size=(batch, 1))
        out.append((x, y))
    return out


def ours_train(batch: int) -> tuple[Runner, int]:
    net = Network(SIZES[0], list(SIZES[1:-1]), "tanh", rng=np.random.default_rng(1))
    opt, loss, data = SGD(net.params.size, LR), Loss("squared"), batches(batch)

    def run(n: int) -> None:
        for i in range(n):
            x, y = data[i % POOL]
            train_step(net, opt, x, y, loss)

    return run, 2000


def ours_train_with_window(batch: int) -> tuple[Runner, int]:
    net = Network(SIZES[0], list(SIZES[1:-1]), "tanh", rng=np.random.default_rng(1))
    opt, loss = SGD(net.params.size, LR), Loss("squared")
    window = Window(2048, SIZES[0], 1)
    x, y = batches(2048)[0]
    window.add_many(x, y)
    rng = np.random.default_rng(2)

    def run(n: int) -> None:
        for _ in range(n):
            bx, by = window.sample(batch, rng)
            train_step(net, opt, bx, by, loss)

    return run, 2000


def ours_predict() -> tuple[Runner, int]:
    net = Network(SIZES[0], list(SIZES[1:-1]), "tanh", rng=np.random.default_rng(1))
    rows = [r[0][0] for r in batches(1)]          # single readings, shape (8,)

    def run(n: int) -> None:
        for i in range(n):
            net.predict(rows[i % POOL])

    return run, 5000


def sklearn_train(batch: int) -> tuple[Runner, int]:
    import warnings

    from sklearn.neural_network import MLPRegressor
    data = batches(batch)
    sk = MLPRegressor(hidden_layer_sizes=SIZES[1:-1], activation="tanh", solver="sgd",
                      momentum=0.0, alpha=0.0, batch_size=batch, shuffle=False,
                      learning_rate="constant", learning_rate_init=2 * LR, max_iter=1,
                      random_state=0)
    warnings.filterwarnings("ignore")

    def run(n: int) -> None:
        for i in range(n):
            x, y = data[i % POOL]
            sk.partial_fit(x, y[:, 0])

    return run, 200


def torch_parts():
    try:
        import torch
    except ImportError:
        return None
    torch.set_num_threads(1)
    torch.manual_seed(0)
    model = torch.nn.Sequential(
        torch.nn.Linear(SIZES[0], SIZES[1]), torch.nn.Tanh(),
        torch.nn.Linear(SIZES[1], SIZES[2]), torch.nn.Tanh(),
        torch.nn.Linear(SIZES[2], SIZES[3])).double()
    return torch, model


def torch_train(batch: int) -> tuple[Runner, int] | None:
    parts = torch_parts()
    if parts is None:
        return None
    torch, model = parts
    opt = torch.optim.SGD(model.parameters(), lr=LR)
    mse = torch.nn.MSELoss()
    data = [(torch.from_numpy(x), torch.from_numpy(y)) for x, y in batches(batch)]

    def run(n: int) -> None:
        for i in range(n):
            x, y = data[i % POOL]
            opt.zero_grad(set_to_none=True)
            mse(model(x), y).backward()
            opt.step()

    return run, 500


def torch_predict() -> tuple[Runner, int] | None:
    parts = torch_parts()
    if parts is None:
        return None
    torch, model = parts
    rows = [torch.from_numpy(r[0][:1]) for r in batches(1)]

    def run(n: int) -> None:
        with torch.inference_mode():
            for i in range(n):
                model(rows[i % POOL])

    return run, 2000


def machine() -> list[str]:
    lines = [f"platform: {platform.platform()}, Python {platform.python_version()}, "
             f"{os.cpu_count()} CPUs"]
    try:
        with open("/proc/cpuinfo") as f:
            model = next((ln.split(":", 1)[1].strip() for ln in f if ln.startswith("model name")),
                         "unknown")
    except OSError:
        model = "unknown"
    lines.append(f"CPU: {model}")
    lines.append(f"numpy {np.__version__}")
    env = {k: os.environ[k] for k in ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE",
                                      "OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS") if k in os.environ}
    lines.append(f"BLAS environment: {env or 'none set'}")
    try:
        from threadpoolctl import threadpool_info
        for info in threadpool_info():
            lines.append("threadpool: " + ", ".join(
                f"{k}={info.get(k)}" for k in ("internal_api", "version", "architecture",
                                               "num_threads", "filepath")))
    except ImportError:
        lines.append("threadpoolctl not importable")
    try:
        import sklearn
        lines.append(f"scikit-learn {sklearn.__version__}")
    except ImportError:
        pass
    try:
        import torch
        lines.append(f"torch {torch.__version__} (threads set to 1)")
    except ImportError:
        lines.append("torch not importable: PyTorch columns skipped")
    return lines


def fmt(v: float | None, unit: str = "") -> str:
    if v is None:
        return "n/a"
    return f"{v:,.0f}{unit}" if v >= 100 else f"{v:,.1f}{unit}"


def main() -> None:
    runners: dict[str, tuple[Runner, int]] = {}
    for batch in (1, 8, 32, 128):
        runners[f"ours/{batch}"] = ours_train(batch)
    runners["ours/window32"] = ours_train_with_window(32)
    runners["ours/predict"] = ours_predict()
    runners["sklearn/32"] = sklearn_train(32)
    for name, make in (("torch/1", lambda: torch_train(1)), ("torch/32", lambda: torch_train(32)),
                       ("torch/predict", torch_predict)):
        made = make()
        if made is not None:
            runners[name] = made
    times = interleaved(runners)
    med = {name: statistics.median(v) for name, v in times.items()}

    def rate(name: str, batch: int) -> float | None:
        return batch / med[name] if name in med else None

    def us(name: str) -> float | None:
        return med[name] * 1e6 if name in med else None

    def median_ratio(a: str, b: str) -> float | None:
        # per-repeat ratios (same load in each repeat), then their median
        if b not in times:
            return None
        return statistics.median(tb / ta for ta, tb in zip(times[a], times[b]))

    ours = {b: rate(f"ours/{b}", b) for b in (1, 8, 32, 128)}
    rows = [("train, batch 1 (steps/s = samples/s)", ours[1], None, rate("torch/1", 1)),
            ("train, batch 8 (samples/s)", ours[8], None, None),
            ("train, batch 32 (samples/s)", ours[32], rate("sklearn/32", 32), rate("torch/32", 32)),
            ("train, batch 128 (samples/s)", ours[128], None, None),
            ("window.sample + train, batch 32 (samples/s)", rate("ours/window32", 32), None, None),
            ("predict one sample (µs)", us("ours/predict"), None, us("torch/predict"))]
    print("## nets benchmark: 8-32-32-1 tanh, float64, plain SGD, squared loss\n")
    print("| measure | edgeprop nets | scikit-learn partial_fit | PyTorch CPU, 1 thread |")
    print("| --- | ---: | ---: | ---: |")
    for name, a, b, c in rows:
        print(f"| {name} | {fmt(a)} | {fmt(b)} | {fmt(c)} |")
    print(f"\nscikit-learn partial_fit at batch 32: {us('sklearn/32'):,.0f} µs per call, "
          "most of it per-call input validation and bookkeeping, not arithmetic")
    ratio_torch = median_ratio("ours/32", "torch/32")
    ratio_sk = median_ratio("ours/32", "sklearn/32")
    print(f"ratio ours/PyTorch at batch 32: {fmt(ratio_torch)}x; "
          f"ours/scikit-learn at batch 32: {fmt(ratio_sk)}x (medians of per-repeat ratios)\n")

    def verdict(ok: bool | None) -> str:
        return "n/a" if ok is None else ("PASS" if ok else "MISS")

    pred = us("ours/predict")
    targets = [
        ("batch 32 >= 300,000 samples/s", fmt(ours[32]), ours[32] >= 300_000),
        ("batch 32 >= 6x PyTorch one thread", f"{fmt(ratio_torch)}x",
         None if ratio_torch is None else ratio_torch >= 6),
        ("batch 32 >= 10x scikit-learn partial_fit", f"{fmt(ratio_sk)}x", ratio_sk >= 10),
        ("batch 1 >= 25,000 steps/s", fmt(ours[1]), ours[1] >= 25_000),
        ("predict one sample <= 10 µs", f"{pred:.1f} µs", pred <= 10),
    ]
    print("| target | measured | verdict |")
    print("| --- | ---: | --- |")
    for name, measured, ok in targets:
        print(f"| {name} | {measured} | {verdict(ok)} |")
    spread = max(v[-1] / min(v) for v in map(sorted, times.values()))
    print(f"\nMedian of {REPEATS} interleaved repeats of ~{TARGET_SECONDS} s each; "
          f"worst max/min spread across repeats {spread:.2f}x (machine load).")
    print("\nMachine:")
    for line in machine():
        print(f"- {line}")


if __name__ == "__main__":
    main()
