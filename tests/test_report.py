"""Report: a readable PNG and a summary whose numbers match a hand-worked example."""
from __future__ import annotations

import math
import re

import numpy as np
import pytest

from daemon.report import drift_starts, model_summary, split_by_model, write_report

T0 = 1733000000.0


def msg(model, k, predicted, measured, low, high, drift=False):
    residual = None if measured is None else measured - predicted
    outside = None if measured is None else not (low <= measured <= high)
    return {"model": model, "t": T0 + 600.0 * k, "predicted": predicted, "measured": measured,
            "residual": residual, "low": low, "high": high, "outside": outside, "drift": drift,
            "checkpoint": None, "samples": 100 + k}


def hand_example():
    # residuals 1, -1, 2, 0 (plus a predict-only tick); the third reading lies outside its band
    return [
        msg("bearing_temp", 0, 40.0, 41.0, 39.0, 42.0),
        msg("bearing_temp", 1, 41.0, 40.0, 39.5, 42.5, drift=True),
        msg("bearing_temp", 2, 42.0, None, 40.0, 44.0, drift=True),
        msg("bearing_temp", 3, 43.0, 45.0, 41.0, 44.5),
        msg("bearing_temp", 4, 44.0, 44.0, 42.0, 46.0, drift=True),
        msg("flow_est", 0, 80.0, 83.0, 78.0, 82.0),
        msg("flow_est", 5, 81.0, 80.0, 79.0, 83.0),
    ]


def test_summary_numbers_by_hand():
    series = {s.name: s for s in split_by_model(hand_example())}
    d = model_summary(series["bearing_temp"])
    # RMSE worked by hand: sqrt((1 + 1 + 4 + 0) / 4) = sqrt(1.5); later half (2, 0): sqrt(2)
    assert d["rmse_all"] == pytest.approx(math.sqrt(1.5), rel=1e-12)
    assert d["rmse_last_half"] == pytest.approx(math.sqrt(2.0), rel=1e-12)
    # ... and against scikit-learn's mean_squared_error
    from sklearn.metrics import mean_squared_error
    assert d["rmse_all"] == pytest.approx(math.sqrt(mean_squared_error([41, 40, 45, 44], [40, 41, 43, 44])))
    assert d["messages"] == 5 and d["measured"] == 4
    assert d["coverage"] == pytest.approx(0.75) and d["fraction_outside"] == pytest.approx(0.25)
    assert d["drift_episodes"] == 2
    f = model_summary(series["flow_est"])
    assert f["rmse_all"] == pytest.approx(math.sqrt((9 + 1) / 2)) and f["coverage"] == 0.5


def test_drift_starts_counts_rising_edges():
    assert drift_starts(np.array([True, True, False, True, False, False, True])).tolist() == [0, 3, 6]
    assert drift_starts(np.array([False, False])).tolist() == []


def test_write_report_png_and_summary(tmp_path):
    events = [{"t": T0 + 1200, "kind": "learning_rate", "value": 0.02},
              {"t": T0 + 1800, "kind": "drift", "model": "bearing_temp"}]
    png, txt = write_report(hand_example(), str(tmp_path / "out"), "pump station demo", events)
    with open(png, "rb") as f:
        assert f.read(8) == b"\x89PNG\r\n\x1a\n"            # PNG signature (PNG spec, RFC 2083)
    import matplotlib.image
    img = matplotlib.image.imread(png)
    assert img.shape[0] > 0 and img.shape[1] > 0
    assert img.shape[:2] == (1120, 1100)                    # 11 x (2 models * 2 panels * 2.8) in at 100 dpi
    assert np.ptp(img[..., :3]) > 0                          # something was drawn
    text = open(txt, encoding="utf-8").read()
    assert text.startswith("pump station demo")
    block = text.split("model flow_est")[0]
    assert re.search(r"RMSE all\s+1\.225\b", block) and re.search(r"RMSE last half\s+1\.414\b", block)
    assert re.search(r"interval coverage\s+0\.750", block) and re.search(r"drift episodes\s+2", block)
    assert "advisory" in text


def test_write_report_refuses_nothing(tmp_path):
    with pytest.raises(ValueError, match="no published messages"):
        write_report([], str(tmp_path), "empty")


def binary_example():
    # probabilities of 1 and the 0/1 readings; the third is a confident miss
    pairs = [(0.9, 1), (0.2, 0), (0.8, 0), (0.4, 0), (0.7, 1), (0.6, 1)]
    return [{"model": "seal_leak", "t": T0 + 60.0 * k, "predicted": p, "measured": y, "residual": y - p,
             "low": None, "high": None, "outside": None, "drift": False, "checkpoint": None,
             "samples": 100 + k} for k, (p, y) in enumerate(pairs)]


def test_binary_summary_by_hand():
    s = split_by_model(binary_example(), binary={"seal_leak"})[0]
    d = model_summary(s)
    # hits: 0.9->1 yes, 0.2->0 yes, 0.8->0 no, 0.4->0 yes, 0.7->1 yes, 0.6->1 yes: 5 of 6
    assert d["accuracy_all"] == pytest.approx(5 / 6) and d["accuracy_last_half"] == pytest.approx(1.0)
    by_hand = -(math.log(0.9) + math.log(0.8) + math.log(0.2) + math.log(0.6) + math.log(0.7) + math.log(0.6)) / 6
    assert d["log_loss_all"] == pytest.approx(by_hand, rel=1e-12)
    from sklearn.metrics import log_loss
    assert d["log_loss_last_half"] == pytest.approx(log_loss([0, 1, 1], [0.4, 0.7, 0.6]), rel=1e-12)
    assert "rmse_all" not in d and "coverage" not in d


def test_binary_model_in_report_txt_has_no_rmse_or_interval(tmp_path):
    _, txt = write_report(hand_example() + binary_example(), str(tmp_path), "mixed", binary=["seal_leak"])
    text = open(txt, encoding="utf-8").read()
    block = text.split("model seal_leak")[1]
    assert re.search(r"accuracy all\s+0\.8333\b", block) and re.search(r"log-loss all\s+0\.5527\b", block)
    assert "RMSE" not in block and "interval" not in block and "nan" not in block
    assert re.search(r"RMSE all\s+1\.225\b", text.split("model bearing_temp")[1])


def test_binary_model_plot_shows_each_messages_log_loss_not_a_residual():
    from matplotlib.figure import Figure

    from daemon.report import _draw_model
    s = split_by_model(binary_example(), binary={"seal_leak"})[0]
    fig = Figure()
    ax_val, ax_res = fig.subplots(2)
    _draw_model(ax_val, ax_res, s, T0, [])
    assert ax_res.get_ylabel() == "log-loss"
    (points,) = ax_res.get_lines()
    # the confident miss (0.8 for a 0) stands out: -ln(0.2) by hand
    assert points.get_ydata()[2] == pytest.approx(-math.log(0.2), rel=1e-12)
    assert max(points.get_ydata()) == points.get_ydata()[2]
