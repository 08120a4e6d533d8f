"""TOML reading on every Python the package declares.

Python 3.11 ships :mod:`tomllib`; on 3.10 the same parser is the ``tomli`` package (a declared
dependency there). Import ``tomllib`` from here, never directly.
"""

from __future__ import annotations

import sys

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised by CI's oldest-Python run
    import tomli as tomllib

__all__ = ["tomllib"]
