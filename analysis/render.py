"""Shared rendering helpers: the autoescaping template environment and safe inline JSON."""

from __future__ import annotations

import functools
import json
import math
from importlib import resources

import jinja2
from buswitness.analysis.result import EXCEPTION_NAMES
from buswitness.analysis.rules.common import pct
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


def hex_tokens(text: str | None) -> str:
    """Hex bytes as the tables show them: upper case, one space apart, so a line breaks between bytes only."""
    return " ".join((text or "").split()).upper()


def utc_clock(utc: str | None) -> str:
    """An ISO UTC time as a table shows it: 2026-11-30 22:00:12.079 (no T, no offset: the column says UTC)."""
    if not utc:
        return "–"
    date, _, time = str(utc).partition("T")
    for mark in ("+", "Z", "-"):
        time = time.split(mark, 1)[0]
    return f"{date} {time[:12]}".strip()


def local_span(start_utc: str | None, end_utc: str | None = None) -> str:
    """The same moments in this computer's time zone (the site's, where the analysis runs on site), with the
    offset, as the terminal and ``record --until`` give them: ``23:00:00 to 07:00:00 UTC+01:00``.
    Empty where that zone is UTC itself or the times are unknown: the report's UTC already says it."""
    from datetime import datetime, timezone

    def local(text: str | None) -> datetime | None:
        try:
            dt = datetime.fromisoformat(str(text).replace("Z", "+00:00"))
        except (TypeError, ValueError):
            return None
        return (dt if dt.tzinfo else dt.replace(tzinfo=timezone.utc)).astimezone()

    a, b = local(start_utc), local(end_utc)
    if a is None or not a.utcoffset():
        return ""
    zone = a.strftime("%z")
    label = f"UTC{zone[:3]}:{zone[3:]}"
    if b is None:
        return f"{a:%Y-%m-%d %H:%M:%S} {label}"
    same_day = a.date() == b.date()
    return f"{a:%Y-%m-%d %H:%M:%S} to {b:%H:%M:%S}" + ("" if same_day else f" on {b:%Y-%m-%d}") + f" {label}"


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


#: Evidence keys whose values are times in ms or s, or shares (0..1), by how the key ends.
_MS_KEYS = ("_ms", "ms")
_S_KEYS = ("_s",)
_SHARE_KEYS = ("share", "_share")
#: Keys a sentence leaves out: they repeat what the finding's statement or the report says in words.
_SKIP_KEYS = ("resolution", "timeout", "sniffer_serial", "master_serial")


def fmt_count(n: int) -> str:
    """A count as a sentence writes it: 1,142."""
    return f"{int(n):,}"


def fmt_share(x: float) -> str:
    """A share (0..1) as a percentage, written as the findings' statements write it (rules.common.pct): 59%, 3.1%,
    0.25%: whole percent from 10 %, one decimal from 1 %, two significant digits below."""
    return pct(float(x))


def _quantity(key: str, value: float) -> str:
    if key.endswith(_SHARE_KEYS):
        return fmt_share(value)
    if key.endswith(_MS_KEYS):
        return f"{value:,.1f} ms"
    if key.endswith(_S_KEYS):
        return f"{value:,.1f} s"
    return f"{value:,.4g}" if abs(value) < 1e6 else f"{value:,.0f}"


#: Words an evidence key spells in lower case that a sentence writes otherwise.
_WORDS = {"crc": "CRC", "p999": "p99.9", "t35": "t3.5", "t15": "t1.5", "utc": "UTC"}


def _label(key: str) -> str:
    words = str(key)
    for suffix in ("_ms", "_s"):
        if words.endswith(suffix):
            words = words[: -len(suffix)]
    return " ".join(_WORDS.get(w, w) for w in words.split("_") if w)


def _phrase(key: str, value: object) -> str:
    label = _label(key)
    if isinstance(value, bool):
        return f"{label}: {'yes' if value else 'no'}"
    if value is None:
        return f"{label} unknown"
    if isinstance(value, int):
        return f"{fmt_count(value)} {label}"
    if isinstance(value, float):
        if not math.isfinite(value):
            return f"{label} unknown"
        return f"{label} {_quantity(key, value)}"
    if isinstance(value, dict):
        if value and all(isinstance(v, dict) and {"name", "count"} <= set(v) for v in value.values()):
            # exception codes (analysis/rules/exception_codes.py): names from MAP V1.1b3 p48-49
            return "; ".join(f"{fmt_count(v['count'])} answer{'s' if v['count'] != 1 else ''} with exception "
                             f"{k}, {v['name']}" for k, v in value.items())
        if {"t_start_s", "t_end_s"} <= set(value):
            rest = ", ".join(_phrase(k, v) for k, v in value.items() if k not in ("t_start_s", "t_end_s"))
            return f"{value['t_start_s']:,.1f} s to {value['t_end_s']:,.1f} s{f' ({rest})' if rest else ''}"
        if "function" in key and all(isinstance(v, int) for v in value.values()):
            inner = ", ".join(f"{fmt_count(v)} of function {k}" for k, v in value.items())
        elif key.endswith(_MS_KEYS):
            inner = ", ".join(f"{_label(str(k))} {_quantity(key, float(v))}" for k, v in value.items()
                              if isinstance(v, (int, float)) and math.isfinite(v))
        elif key.endswith(_SHARE_KEYS):
            inner = ", ".join(f"{_label(str(k))} {fmt_share(v)}" for k, v in value.items()
                              if isinstance(v, (int, float)))
        else:
            inner = ", ".join(f"{_label(str(k))} {fmt_count(v) if isinstance(v, int) and not isinstance(v, bool) else fmt_value(v)}"
                              for k, v in value.items() if v is not None)
        return f"{label}: {inner}" if inner else f"{label}: none"
    if isinstance(value, (list, tuple)):
        items = [(_phrase(key, v) if isinstance(v, dict) else fmt_value(v)) for v in value]
        joiner = "; " if any(isinstance(v, (dict, list, tuple)) for v in value) else ", "
        return f"{label}: {joiner.join(items)}" if items else f"{label}: none"
    return f"{label} {value}"


def evidence_sentence(evidence: dict) -> str:
    """A finding's evidence as one sentence: "1,929 requests, 1,142 damaged, damaged share 59.2 %, ..."."""
    parts = [_phrase(k, v) for k, v in (evidence or {}).items() if k not in _SKIP_KEYS]
    if not parts:
        return ""
    text = "; ".join(parts) if any(";" in p or ":" in p for p in parts) else ", ".join(parts)
    return text[0].upper() + text[1:] + "."


def exceptions_sentence(by_code: dict) -> str:
    """"137 answers with exception 04, server device failure; 2 with exception 02, illegal data address".

    Codes as two hex digits and their names from MAP V1.1b3 p48-49 (result.EXCEPTION_NAMES)."""
    parts = []
    for i, (code, n) in enumerate(sorted(by_code.items(), key=lambda kv: (-kv[1], kv[0]))):
        noun = ("answers" if n != 1 else "answer") if i == 0 else ""
        lead = f"{fmt_count(n)} {noun} with" if noun else f"{fmt_count(n)} with"
        parts.append(f"{lead} exception {int(code):02X}, {exception_name(code)}")
    return "; ".join(parts)


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
                       evidence=evidence_items, value=fmt_value, sentence=evidence_sentence,
                       exceptions=exceptions_sentence, count=fmt_count, share=fmt_share, hexwrap=hex_tokens,
                       clock=utc_clock, localspan=local_span)
    return env


def _load(name: str) -> str:
    return resources.files("buswitness.analysis.templates").joinpath(name).read_text(encoding="utf-8")


def stylesheet(name: str) -> str:
    return _load(name)
