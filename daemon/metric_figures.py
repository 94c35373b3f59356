"""Worker-side figures that reach the Prometheus registry only when it is read.

Why: a prometheus-client call takes a lock and costs about a microsecond, and the worker
made ~20 of them per sample. Here the worker adds to plain numbers; a scrape (or any
collection) copies them in first, so a reader never sees stale values.
"""
from __future__ import annotations

import math
import time
from bisect import bisect_left
from typing import Any, Iterator

import numpy as np
import prometheus_client.metrics as _client_metrics
from prometheus_client import Counter, Gauge
from prometheus_client.metrics_core import CounterMetricFamily, Metric
from prometheus_client.utils import floatToGoString


class Pending:
    """A metric family the worker feeds through plain numbers, brought in before each read.

    Collecting the family (a scrape, ``get_sample_value``, a ``name[]``-restricted scrape)
    first copies the pending figures in, so a reader never sees stale values.
    """

    def bring_in(self) -> None:
        """Replaced by ``_ModelFamilies.bring_in`` on the registered family."""

    def collect(self) -> Any:
        self.bring_in()
        return super().collect()       # type: ignore[misc]


class PendingCounter(Pending, Counter):
    pass


class PendingGauge(Pending, Gauge):
    pass


class MessageFigures:
    """Messages the worker handled and their processing-time histogram, as a collector.

    The worker adds to plain counts (one per bucket, not cumulative) and a sum; a scrape
    reads a copy of them. Exports what a prometheus-client ``Counter`` and ``Histogram``
    would: ``messages_received_total`` and ``message_processing_seconds_{bucket,count,sum}``,
    each with its ``_created`` sample.
    """

    def __init__(self, prefix: str, buckets: tuple[float, ...]) -> None:
        self.RECEIVED = prefix + "messages_received"
        self.PROCESSING = prefix + "message_processing_seconds"
        self.buckets = buckets
        self.counts = [0] * (len(buckets) + 1)     # the last one is +Inf
        self.sum = 0.0
        self.created = time.time()
        self._le = [floatToGoString(b) for b in (*buckets, math.inf)]

    def observe(self, seconds: float) -> None:
        """Count one message; a time equal to a bucket's bound falls in that bucket."""
        self.counts[bisect_left(self.buckets, seconds)] += 1
        self.sum += seconds

    def describe(self) -> list[Metric]:
        return [CounterMetricFamily(self.RECEIVED, "Messages the worker took from the queue."),
                Metric(self.PROCESSING, "Worker time per message, decode to metrics.", "histogram")]

    def collect(self) -> Iterator[Metric]:
        counts, total_seconds = list(self.counts), self.sum
        created = self.created if getattr(_client_metrics, "_use_created", True) else None
        received, histogram = self.describe()
        received.add_metric([], float(sum(counts)), created=created)
        yield received
        cumulative = 0
        for le, n in zip(self._le, counts):
            cumulative += n
            histogram.add_sample(self.PROCESSING + "_bucket", {"le": le}, float(cumulative))
        histogram.add_sample(self.PROCESSING + "_count", {}, float(cumulative))
        histogram.add_sample(self.PROCESSING + "_sum", {}, total_seconds)
        if created is not None:
            histogram.add_sample(self.PROCESSING + "_created", {}, created)
        yield histogram


class WindowStats:
    """Ring buffer behind the windowed error gauges (worker thread only)."""

    def __init__(self, binary: bool, window: int, refresh_every: int,
                 percentiles: tuple[int, ...]) -> None:
        if window < 1 or refresh_every < 1:
            raise ValueError("residual_window and refresh_every must be >= 1")
        self.binary = binary
        self.percentiles = percentiles
        self.err = np.zeros(window)          # residuals, or per-sample log-loss when binary
        self.hit = np.zeros(window)          # binary: 1 when classed right
        self.count = self.pos = 0
        self.every = refresh_every
        self.pending = refresh_every - 1     # so the first outcome refreshes the gauges

    def add(self, measured: float, predicted: float) -> bool:
        """Take one outcome; True when the gauges are due for a refresh."""
        if self.binary:
            # Probability clipped as scikit-learn's log_loss does (float64 eps).
            p = min(max(predicted, 2.220446049250313e-16), 1 - 2.220446049250313e-16)
            e = -math.log(p) if measured >= 0.5 else -math.log1p(-p)
            self.hit[self.pos] = float((predicted >= 0.5) == (measured >= 0.5))
        else:
            e = measured - predicted
        if math.isfinite(e):                 # a non-finite value is the guard's business
            self.err[self.pos] = e
            self.pos = (self.pos + 1) % self.err.size
            self.count = min(self.count + 1, self.err.size)
        self.pending += 1
        if self.pending < self.every or not self.count:
            return False
        self.pending = 0
        return True

    def summary(self) -> list[float]:
        """Regression: RMSE then residual percentiles; binary: mean log-loss then accuracy."""
        e = self.err[:self.count]
        if self.binary:
            return [float(np.mean(e)), float(np.mean(self.hit[:self.count]))]
        return [float(np.sqrt(np.mean(e * e))), *linear_percentiles(e, self.percentiles)]


def linear_percentiles(values: np.ndarray, percentiles: tuple[int, ...]) -> list[float]:
    """``np.percentile(values, percentiles)`` (its default "linear" method), bit for bit.

    Why not call it: np.percentile costs ~55 us for 500 values and five percentiles, one sort
    and five interpolations cost ~8. Same steps as numpy's: virtual index (n - 1) * p / 100,
    then a + (b - a) * g, or b - (b - a) * (1 - g) when g >= 0.5. Finite values only.
    """
    s = np.sort(values).tolist()
    last = len(s) - 1
    out = []
    for p in percentiles:
        v = last * (p / 100)
        lo = math.floor(v)
        g = v - lo
        a, b = s[lo], s[min(lo + 1, last)]
        d = b - a
        out.append(b - d * (1 - g) if g >= 0.5 else a + d * g)
    return out
