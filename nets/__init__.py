"""Small multilayer perceptrons on numpy alone, for learning from a live stream.

Pure and deterministic: no I/O beyond save/load, no clocks, no logging;
randomness only through a ``numpy.random.Generator`` the caller passes in.
"""
from .activations import ACTIVATIONS, sigmoid
from .bundle import check_architecture, load_bundle, restore_parts, save_bundle
from .losses import LOSS_NAMES, Loss
from .network import Network
from .optim import SGD, Adam, make_optimizer
from .scaling import RunningScaler
from .store import StateFileError, read_state, state_bytes, write_state
from .train import train_step
from .window import Window

__all__ = [
    "ACTIVATIONS", "LOSS_NAMES", "Adam", "Loss", "Network", "RunningScaler", "SGD",
    "StateFileError", "Window", "check_architecture", "load_bundle", "make_optimizer",
    "read_state", "restore_parts", "save_bundle", "sigmoid", "state_bytes", "train_step",
    "write_state",
]
