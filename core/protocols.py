"""The protocol registry: one line per protocol, names only (no protocol's bytes live here).

Each entry maps the name stored in a capture header and taken by ``--protocol`` to the
module under ``buswitness.decode.protocols`` that implements it (loaded only by the decoder,
so the capture floor can check a header's protocol without importing the decoder).
Adding a protocol: a folder or module in ``decode/protocols/`` and one line here.
"""

from __future__ import annotations

REGISTRY: dict[str, str] = {
    "modbus-rtu": "buswitness.decode.protocols.modbus_rtu",
    "modbus-ascii": "buswitness.decode.protocols.modbus_ascii",
    "profibus-dp": "buswitness.decode.protocols.profibus_dp",
}

#: Names older captures and callers use for the same protocols.
ALIASES = {"rtu": "modbus-rtu", "ascii": "modbus-ascii", "modbus": "modbus-rtu", "profibus": "profibus-dp"}

DEFAULT = "modbus-rtu"
NAMES = tuple(REGISTRY)


def canonical(name: object) -> str:
    """The registry name for ``name`` (old header values "rtu"/"ascii" included); ValueError if unknown."""
    if not isinstance(name, str):
        raise ValueError(f"protocol {name!r} is not one of {', '.join(NAMES)}")
    key = name.strip().lower().replace("_", "-")
    key = ALIASES.get(key, key)
    if key not in REGISTRY:
        raise ValueError(f"protocol {name!r} is not one of {', '.join(NAMES)}")
    return key


__all__ = ["ALIASES", "DEFAULT", "NAMES", "REGISTRY", "canonical"]
