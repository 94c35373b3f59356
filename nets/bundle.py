"""Save a whole learner (network, optimiser, scalers, window, extras) as one state file.

Arrays are stored under ``<part>/<name>`` keys; the JSON header records the
architecture so that a file is refused with reason ``shape`` before any array
is copied into a network of a different size.
"""
from __future__ import annotations

from typing import IO, Any, Mapping, Protocol, Union

import numpy as np

from .network import Network
from .store import StateFileError, read_state, write_state


class HasState(Protocol):
    def state(self) -> dict[str, np.ndarray]: ...
    def load_state(self, arrays: dict[str, np.ndarray]) -> None: ...


Dest = Union[str, IO[bytes]]


def bundle_arrays(parts: Mapping[str, HasState]) -> dict[str, np.ndarray]:
    """Flatten each part's ``state()`` into ``part/name`` keys."""
    out: dict[str, np.ndarray] = {}
    for part, obj in parts.items():
        if "/" in part:
            raise ValueError(f"part name {part!r} may not contain '/'")
        for name, arr in obj.state().items():
            out[f"{part}/{name}"] = np.asarray(arr)
    return out


def network_header(net: Network) -> dict[str, Any]:
    """Header fields that identify a network's shape."""
    return {"sizes": net.sizes, "activation": net.activation, "head": net.head,
            "dtype": net.dtype.name, "architecture": net.architecture}


def save_bundle(dest: Dest, net: Network, parts: Mapping[str, HasState],
                meta: Mapping[str, Any] | None = None) -> None:
    """Write ``net`` plus every other part to ``dest`` with a checksummed header."""
    arrays = bundle_arrays({"net": net, **parts})
    header = {**(meta or {}), **network_header(net), "parts": sorted(["net", *parts])}
    write_state(dest, arrays, header)


def split_parts(arrays: Mapping[str, np.ndarray]) -> dict[str, dict[str, np.ndarray]]:
    """Group ``part/name`` keys back into one dict per part."""
    parts: dict[str, dict[str, np.ndarray]] = {}
    for key, arr in arrays.items():
        part, _, name = key.partition("/")
        parts.setdefault(part, {})[name] = arr
    return parts


def check_architecture(header: Mapping[str, Any], net: Network) -> None:
    """Raise StateFileError('shape') unless the header describes ``net``'s shape."""
    want = network_header(net)
    for key in ("sizes", "activation", "head", "dtype"):
        if header.get(key) != want[key]:
            raise StateFileError("shape", f"saved {key} {header.get(key)!r} differs from "
                                 f"configured {want[key]!r} (saved {header.get('architecture')!r}, "
                                 f"configured {want['architecture']!r})")


def restore_parts(arrays: Mapping[str, np.ndarray], header: Mapping[str, Any], net: Network,
                  parts: Mapping[str, HasState]) -> dict[str, dict[str, np.ndarray]]:
    """Load saved arrays into ``net`` and ``parts``; return the parts nobody claimed.

    All or nothing: if any part refuses its arrays, the parts already loaded are put
    back as they were, so a refused file never leaves a half-restored learner.
    """
    check_architecture(header, net)
    grouped = split_parts(arrays)
    targets: dict[str, HasState] = {"net": net, **parts}
    for name in targets:
        if name not in grouped:
            raise StateFileError("shape", f"state file has no part {name!r}")
    backup = {name: obj.state() for name, obj in targets.items()}
    try:
        for name, obj in targets.items():
            obj.load_state(grouped.pop(name))
    except (KeyError, ValueError) as exc:
        for name, obj in targets.items():
            obj.load_state(backup[name])
        raise StateFileError("shape", str(exc)) from None
    return grouped


def load_bundle(src: Dest, net: Network, parts: Mapping[str, HasState]
                ) -> tuple[dict[str, Any], dict[str, dict[str, np.ndarray]]]:
    """Read ``src`` into ``net`` and ``parts``; return (header, unclaimed parts)."""
    arrays, header = read_state(src)
    return header, restore_parts(arrays, header, net, parts)
