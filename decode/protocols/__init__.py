"""Field protocols behind one small interface (:mod:`.base`); the registry is :mod:`buswitness.protocols`.

``get("modbus-rtu")`` returns the protocol object; old names ("rtu", "ascii") are understood.
"""

from __future__ import annotations

import importlib

from buswitness.decode.protocols.base import FieldProtocol
from buswitness.protocols import NAMES, REGISTRY, canonical


def get(name: str) -> FieldProtocol:
    """The protocol object registered under ``name`` (ValueError if none is)."""
    return importlib.import_module(REGISTRY[canonical(name)]).PROTOCOL


__all__ = ["NAMES", "get"]
