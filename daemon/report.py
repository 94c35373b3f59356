"""A picture and a few numbers from published messages: did the soft sensor track, and when not?

Used by ``demo``, ``replay`` and ``tune``. The plot puts measured against predicted with
the prediction interval, the residual with the same interval centred on zero
(so a reading outside its band stands out), and marks drift episodes and
learning-rate changes, with time in hours from the first message.
matplotlib is an optional extra, imported only when a plot is drawn, and the
figure is rendered with the Agg canvas directly so no global backend is set.
"""
from __future__ import annotations

import math
import os
import textwrap
from dataclasses import dataclass
from typing import Collection, Optional

import numpy as np

ADVISORY = ("Predictions are advisory: never feed trips, interlocks or safety functions from them; "
            "local codes and licensed practice govern.")


@dataclass
class ModelSeries:
    """One model's messages as float arrays (NaN where a field was null)."""

    name: str
    t: np.ndarray
    predicted: np.ndarray
    measured: np.ndarray
    low: np.ndarray
    high: np.ndarray
    drift: np.ndarray
    outside: np.ndarray        # 1, 0, or NaN on predict-only ticks
    binary: bool = False       # predicted is a probability of 1: no RMSE, no interval


def _floats(messages: list[dict], key: str) -> np.ndarray:
    return np.array([np.nan if m.get(key) is None else float(m[key]) for m in messages], float)


def split_by_model(messages: list[dict], binary: Collection[str] = ()) -> list[ModelSeries]:
    """Group messages per model, in order of first appearance, sorted by time within a model.

    ``binary`` names the binary models: their messages do not say so themselves,
    and a 0/1 target scored as a number gives figures that mean nothing.
    """
    groups: dict[str, list[dict]] = {}
    for m in messages:
        groups.setdefault(str(m.get("model", "?")), []).append(m)
    out = []
    for name, ms in groups.items():
        ms = sorted(ms, key=lambda m: float(m["t"]))
        out.append(ModelSeries(name, _floats(ms, "t"), _floats(ms, "predicted"), _floats(ms, "measured"),
                               _floats(ms, "low"), _floats(ms, "high"),
                               np.array([bool(m.get("drift")) for m in ms]), _floats(ms, "outside"),
                               name in binary))
    return out


def drift_starts(drift: np.ndarray) -> np.ndarray:
    """Indices where the drift flag turns true (a flag already up at the start counts)."""
    prev = np.concatenate([[False], drift[:-1]])
    return np.flatnonzero(drift & ~prev)


def _rmse(r: np.ndarray) -> float:
    return math.sqrt(float(np.mean(r * r))) if r.size else math.nan


def log_loss_terms(p: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Log-loss of each probability ``p`` of 1 against 0/1 ``y``.

    Clipped to [1e-12, 1 - 1e-12] so that one confident miss costs a large but
    finite amount, and rates with such a miss still compare with the others.
    """
    p = np.clip(np.asarray(p, float), 1e-12, 1.0 - 1e-12)
    y = np.asarray(y, float)
    return -(y * np.log(p) + (1.0 - y) * np.log(1.0 - p))


def accuracy(p: np.ndarray, y: np.ndarray) -> float:
    """Share of predictions on the right side of 0.5 (a probability of exactly 0.5 counts as 1)."""
    p, y = np.asarray(p, float), np.asarray(y, float)
    return float(np.mean((p >= 0.5) == (y >= 0.5))) if p.size else math.nan


def _mean(x: np.ndarray) -> float:
    return float(np.mean(x)) if x.size else math.nan


def binary_summary(s: ModelSeries) -> dict[str, float]:
    """Counts, accuracy and log-loss (all, later half of measured messages), drift episodes."""
    has = ~np.isnan(s.measured) & ~np.isnan(s.predicted)
    p, y = s.predicted[has], s.measured[has]
    half = p.size // 2
    return {
        "messages": int(s.t.size), "measured": int(has.sum()),
        "accuracy_all": accuracy(p, y), "accuracy_last_half": accuracy(p[half:], y[half:]),
        "log_loss_all": _mean(log_loss_terms(p, y)),
        "log_loss_last_half": _mean(log_loss_terms(p[half:], y[half:])),
        "drift_episodes": int(drift_starts(s.drift).size),
    }


def model_summary(s: ModelSeries) -> dict[str, float]:
    """Counts, RMSE (all, later half of measured messages), interval coverage, drift episodes.

    A binary model gets ``binary_summary`` instead.
    """
    if s.binary:
        return binary_summary(s)
    has = ~np.isnan(s.measured) & ~np.isnan(s.predicted)
    r = (s.measured - s.predicted)[has]
    banded = has & ~np.isnan(s.low) & ~np.isnan(s.high)
    inside = (s.measured[banded] >= s.low[banded]) & (s.measured[banded] <= s.high[banded])
    flagged = s.outside[~np.isnan(s.outside)]
    return {
        "messages": int(s.t.size), "measured": int(has.sum()),
        "rmse_all": _rmse(r), "rmse_last_half": _rmse(r[r.size // 2:]),
        "coverage": float(inside.mean()) if inside.size else math.nan,
        "fraction_outside": float(flagged.mean()) if flagged.size else math.nan,
        "drift_episodes": int(drift_starts(s.drift).size),
    }


def summary_text(title: str, series: list[ModelSeries]) -> str:
    """Plain-text summary, one block per model."""
    lines = [title, ""]
    for s in series:
        d = model_summary(s)
        if s.binary:
            lines += _binary_lines(s.name, d)
            continue
        lines += [f"model {s.name}",
                  f"  messages          {d['messages']} ({d['measured']} with a measurement)",
                  f"  RMSE all          {d['rmse_all']:.4g}",
                  f"  RMSE last half    {d['rmse_last_half']:.4g}",
                  f"  interval coverage {d['coverage']:.3f} (measured within low..high)",
                  f"  fraction outside  {d['fraction_outside']:.3f} (flagged in messages)",
                  f"  drift episodes    {d['drift_episodes']}", ""]
    return "\n".join(lines + [ADVISORY, ""])


def _binary_lines(name: str, d: dict[str, float]) -> list[str]:
    return [f"model {name} (binary: predicted is the probability of 1)",
            f"  messages            {d['messages']} ({d['measured']} with a measurement)",
            f"  accuracy all        {d['accuracy_all']:.4f} (probability >= 0.5 taken as 1)",
            f"  accuracy last half  {d['accuracy_last_half']:.4f}",
            f"  log-loss all        {d['log_loss_all']:.4g}",
            f"  log-loss last half  {d['log_loss_last_half']:.4g}",
            f"  drift episodes      {d['drift_episodes']}", ""]


def _mark_events(ax, events: list[dict], model: str, t0: float) -> None:
    for e in events:
        if e.get("t") is None or e.get("model") not in (None, model):
            continue
        x = (float(e["t"]) - t0) / 3600.0
        if e.get("kind") == "learning_rate":
            ax.axvline(x, color="tab:green", linestyle=":", linewidth=1.0)
            ax.annotate(f"lr {e.get('value')}", (x, 1.0), xycoords=("data", "axes fraction"),
                        fontsize=7, color="tab:green", rotation=90, va="top", ha="right")
        elif e.get("kind") == "drift":
            ax.axvline(x, color="tab:red", linestyle="--", linewidth=0.8)


def _draw_model(ax_val, ax_res, s: ModelSeries, t0: float, events: list[dict]) -> None:
    h = (s.t - t0) / 3600.0
    if not s.binary:         # a binary model has no interval
        ax_val.fill_between(h, s.low, s.high, color="tab:blue", alpha=0.2, linewidth=0, label="interval")
    ax_val.plot(h, s.measured, ".", color="black", markersize=1.5, label="measured")
    ax_val.plot(h, s.predicted, color="tab:blue", linewidth=0.8, label="predicted")
    ax_val.set_ylabel(f"{s.name}\nP(1)" if s.binary else s.name)
    ax_val.legend(loc="upper left", fontsize=7, ncol=3)
    if s.binary:
        # measured minus a probability means little; each message's log-loss shows the
        # confident misses (tall points) that the accuracy figure hides
        ax_res.plot(h, log_loss_terms(s.predicted, s.measured), ".", color="tab:orange", markersize=1.5)
        ax_res.set_ylabel("log-loss")
    else:
        ax_res.fill_between(h, s.low - s.predicted, s.high - s.predicted, color="tab:blue", alpha=0.2,
                            linewidth=0)
        ax_res.plot(h, s.measured - s.predicted, ".", color="tab:orange", markersize=1.5)
        ax_res.axhline(0.0, color="grey", linewidth=0.6)
        ax_res.set_ylabel("residual")
    for ax in (ax_val, ax_res):
        for i in drift_starts(s.drift):
            ax.axvline(h[i], color="tab:red", linestyle="--", linewidth=0.8)
        _mark_events(ax, events, s.name, t0)


def write_report(messages: list[dict], out_dir: str, title: str,
                 events: Optional[list[dict]] = None, binary: Collection[str] = ()) -> tuple[str, str]:
    """Write ``report.png`` and ``report.txt`` into ``out_dir``; return their paths.

    ``binary`` names the binary models, reported by accuracy and log-loss.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    series = split_by_model(messages, binary)
    if not series:
        raise ValueError("no published messages to report on")
    os.makedirs(out_dir, exist_ok=True)
    events = list(events or [])
    t0 = min(float(s.t[0]) for s in series)
    fig = Figure(figsize=(11, 2.8 * 2 * len(series)), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(2 * len(series), 1, sharex=True, squeeze=False)[:, 0]
    for k, s in enumerate(series):
        _draw_model(axes[2 * k], axes[2 * k + 1], s, t0, events)
    axes[-1].set_xlabel("hours from start")
    legend = "(red dashed: drift, green dotted: learning rate)"
    fig.suptitle(textwrap.fill(f"{title}  {legend}", 120), fontsize=10)
    png = os.path.join(out_dir, "report.png")
    fig.savefig(png, dpi=100)
    txt = os.path.join(out_dir, "report.txt")
    with open(txt, "w", encoding="utf-8") as f:
        f.write(summary_text(title, series))
    return png, txt
