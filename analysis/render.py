"""Shared rendering helpers: the autoescaping template environment and safe inline JSON."""

from __future__ import annotations

import functools
import json
import math
from importlib import resources

import jinja2
from buswitness.analysis.result import EXCEPTION_NAMES
from buswitness.decode.functions import FUNCTION_NAMES


def function_name(code: int) -> str:
    """``3 (read holding registers)``; names from the MAP V1.1b3 function code table."""
    base = code & 0x7F
    name = FUNCTION_NAMES.get(base, "function")
    return f"{code} ({name}{', exception' if code & 0x80 else ''})"


def exception_name(code: int) -> str:
    return EXCEPTION_NAMES.get(int(code), "non-standard code")


def fmt_ms(value: float | None, digits: int = 1) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    return f"{value:.{digits}f}"


def fmt_interval(pair: list | None) -> str:
    if not pair:
        return ""
    return f"{pair[0]:.1f}–{pair[1]:.1f}"


def fmt_value(value: object) -> str:
    """A finding's evidence value as plain text: numbers rounded, mappings and lists spelled out."""
    if isinstance(value, bool) or value is None:
        return {True: "yes", False: "no", None: "–"}[value]
    if isinstance(value, float):
        if not math.isfinite(value):
            return "–"
        return f"{value:.4g}" if abs(value) < 1e6 else f"{value:,.0f}"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, dict):
        return ", ".join(f"{str(k).replace('_', ' ')} {fmt_value(v)}" for k, v in value.items()) or "–"
    if isinstance(value, (list, tuple)):
        return "; ".join(fmt_value(v) for v in value) or "–"
    return str(value)


def evidence_items(evidence: dict) -> list[tuple[str, str]]:
    """(label, text) pairs of a finding's evidence, for the templates."""
    return [(str(k).replace("_", " "), fmt_value(v)) for k, v in (evidence or {}).items()]


def script_json(data: object) -> str:
    """JSON that is safe inside ``<script>``: ``<``, ``>`` and ``&`` as unicode escapes, no NaN."""
    text = json.dumps(data, allow_nan=False, separators=(",", ":"))
    return (text.replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")
            .replace("\u2028", "\\u2028").replace("\u2029", "\\u2029"))


def finite(values: list) -> list:
    """Floats with NaN turned into None (JSON null: a gap in a chart)."""
    return [None if isinstance(v, float) and not math.isfinite(v) else v for v in values]


@functools.lru_cache(maxsize=1)
def environment() -> jinja2.Environment:
    """Templates from the package, autoescaped whatever their name; built once, so each template compiles once."""
    env = jinja2.Environment(loader=jinja2.FunctionLoader(_load), autoescape=True, undefined=jinja2.StrictUndefined,
                             trim_blocks=True, lstrip_blocks=True)
    env.filters.update(ms=fmt_ms, interval=fmt_interval, fname=function_name, exname=exception_name,
                       evidence=evidence_items, value=fmt_value)
    return env


def _load(name: str) -> str:
    return resources.files("buswitness.analysis.templates").joinpath(name).read_text(encoding="utf-8")


def stylesheet(name: str) -> str:
    return _load(name)
