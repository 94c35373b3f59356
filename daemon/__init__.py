"""edgeprop service: MQTT in, online learning, predictions and residuals out."""

__version__ = "0.1.0"
