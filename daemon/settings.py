"""Frozen settings the rest of the daemon reads; built and validated by ``daemon.config``.

Field names mirror the YAML keys one to one, so an error message's key path
(``models[0].training.learning_rate``) points at the same name a user typed.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Optional


@dataclass(frozen=True)
class TlsSettings:
    ca_file: str
    cert_file: Optional[str] = None
    key_file: Optional[str] = None


@dataclass(frozen=True)
class BrokerSettings:
    host: str = "127.0.0.1"
    port: int = 1883
    client_id: Optional[str] = None          # None: "edgeprop-<node>"
    username: Optional[str] = None
    password_file: Optional[str] = None      # must not be readable by group/others
    tls: Optional[TlsSettings] = None
    keepalive_s: int = 30
    protocol: str = "3.1.1"                  # "3.1.1" | "5"
    reconnect_min_s: float = 0.5
    reconnect_max_s: float = 30.0
    queue_size: int = 10000                  # bounded inbound queue, readings
    # Payload bytes waiting in the queue: with 10,000 readings of 64 kB the count alone would
    # allow 640 MB; 16 MiB is sixteen full queues of ~100-byte readings yet small beside an
    # edge board's RAM (common practice, no source).
    queue_bytes: int = 16 * 1024 * 1024
    max_payload_bytes: int = 65536


@dataclass(frozen=True)
class CheckpointSettings:
    every_s: float = 300.0
    keep: int = 20
    fresh_on_mismatch: bool = False          # start a fresh model when the saved shape differs


@dataclass(frozen=True)
class MetricsTls:
    cert_file: str
    key_file: str


@dataclass(frozen=True)
class MetricsAuth:
    username: str
    password_file: str


@dataclass(frozen=True)
class MetricsSettings:
    listen: Optional[str] = "127.0.0.1:9740"   # None disables the endpoint
    tls: Optional[MetricsTls] = None
    basic_auth: Optional[MetricsAuth] = None


@dataclass(frozen=True)
class ControlSettings:
    socket: Optional[str] = None             # None: <state_dir>/control.sock


@dataclass(frozen=True)
class LoggingSettings:
    level: str = "info"                      # debug | info | warning | error


@dataclass(frozen=True)
class SourceSettings:
    """Where one reading comes from: a topic and, for JSON objects, a dot path."""

    topic: str
    field: Optional[str] = None
    time_field: Optional[str] = None


@dataclass(frozen=True)
class InputSettings:
    name: str
    topic: str
    field: Optional[str] = None
    time_field: Optional[str] = None
    lags_s: tuple[float, ...] = (0.0,)

    @property
    def source(self) -> SourceSettings:
        return SourceSettings(self.topic, self.field, self.time_field)


@dataclass(frozen=True)
class AlignSettings:
    max_age_s: float = 60.0
    late_tolerance_s: float = 5.0            # readings older than newest-minus-this are dropped
    max_ahead_s: Optional[float] = 3600.0    # sensor times further ahead of arrival are refused
    history: int = 512                       # readings kept per input


@dataclass(frozen=True)
class NetSettings:
    hidden: tuple[int, ...] = (32, 32)
    activation: str = "tanh"                 # tanh | relu | leaky_relu | sigmoid | identity
    seed: int = 1
    dtype: str = "float64"                   # float64 | float32
    init: str = "auto"                       # auto | glorot | he


@dataclass(frozen=True)
class TrainingSettings:
    learning_rate: float = 0.01
    batch_size: int = 32
    window: int = 2048
    steps_per_sample: int = 1
    loss: str = "squared"                    # squared | huber | logistic
    huber_delta: float = 1.0
    optimizer: str = "sgd"                   # sgd | adam
    momentum: float = 0.0
    nesterov: bool = False
    weight_decay: float = 0.0
    clip_norm: Optional[float] = None
    warmup_samples: int = 64
    sampling: str = "uniform"                # uniform | recent
    input_clip: float = 6.0                  # clip standardised inputs to +-this


@dataclass(frozen=True)
class DriftSettings:
    detector: str = "page_hinkley"           # page_hinkley | adwin | none
    delta: float = 0.005                     # Page-Hinkley allowance, in loss units
    threshold: float = 50.0                  # Page-Hinkley alarm level
    min_samples: int = 30
    confidence: float = 0.002                # ADWIN delta
    input_threshold: float = 4.0             # input shift alarm, reference spreads
    input_reference: int = 500               # samples in an input's reference
    input_recent: int = 50                   # samples in an input's recent mean
    on_drift: str = "none"                   # none | boost_lr | shrink_window | restore
    boost_factor: float = 3.0
    boost_samples: int = 500
    hold_samples: int = 200                  # how long the published drift flag stays up


@dataclass(frozen=True)
class IntervalSettings:
    coverage: float = 0.9
    window: int = 500                        # recent absolute residuals kept
    adapt_rate: float = 0.005                # adaptive conformal step (gamma)


@dataclass(frozen=True)
class GuardSettings:
    enabled: bool = True
    blowup_factor: float = 10.0              # short loss above this x long-run loss ...
    blowup_samples: int = 20                 # ... for this many samples in a row
    lr_factor: float = 0.5                   # learning rate multiplied by this on a restore


@dataclass(frozen=True)
class PublishSettings:
    topic: Optional[str] = None              # None: edgeprop/<node>/<model>
    qos: int = 0
    retain: bool = False
    every_s: Optional[float] = None          # predict-only cadence


@dataclass(frozen=True)
class ModelSettings:
    name: str
    target: SourceSettings
    inputs: tuple[InputSettings, ...]
    task: str = "regression"                 # regression | binary
    align: AlignSettings = field(default_factory=AlignSettings)
    net: NetSettings = field(default_factory=NetSettings)
    training: TrainingSettings = field(default_factory=TrainingSettings)
    drift: DriftSettings = field(default_factory=DriftSettings)
    interval: IntervalSettings = field(default_factory=IntervalSettings)
    guard: GuardSettings = field(default_factory=GuardSettings)
    publish: PublishSettings = field(default_factory=PublishSettings)

    @property
    def n_features(self) -> int:
        return sum(len(i.lags_s) for i in self.inputs)


@dataclass(frozen=True)
class Settings:
    models: tuple[ModelSettings, ...]
    node: str = "edgeprop"
    broker: BrokerSettings = field(default_factory=BrokerSettings)
    state_dir: str = "./state"
    checkpoints: CheckpointSettings = field(default_factory=CheckpointSettings)
    metrics: MetricsSettings = field(default_factory=MetricsSettings)
    control: ControlSettings = field(default_factory=ControlSettings)
    logging: LoggingSettings = field(default_factory=LoggingSettings)

    def publish_topic(self, model: ModelSettings) -> str:
        return model.publish.topic or f"edgeprop/{self.node}/{model.name}"

    @property
    def status_topic(self) -> str:
        return f"edgeprop/{self.node}/status"

    @property
    def control_socket(self) -> str:
        import os
        return self.control.socket or os.path.join(self.state_dir, "control.sock")
