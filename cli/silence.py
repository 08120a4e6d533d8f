"""Silence is loud: ``record`` and ``watch`` say when no bytes, or no valid frames, arrive.

A recording of a bus that is not there (A/B swapped, wrong port, wrong baud rate) looks just
like a quiet night until someone analyses it the next morning. :class:`SilenceCheck` looks at
the running counts once per window (60 s; shorter in tests) and returns the warnings to print,
once per silent spell, and the lines the closing summary repeats. Pure: the caller passes the
elapsed time and the counts, so it is tested without a clock or a port.
"""

from __future__ import annotations

from dataclasses import dataclass, field

#: How long without bytes or valid frames before the warning (the issue's "within a minute").
SILENCE_WINDOW_S = 60.0


def _span(seconds: float) -> str:
    s = int(seconds)  # whole seconds, as the summary's elapsed time shows them
    if s < 120:
        return f"{s} s"
    return f"{s // 3600:d}:{s // 60 % 60:02d}:{s % 60:02d}"


@dataclass
class SilenceCheck:
    """Per-window check of the bytes per port and the valid frames on the bus."""

    ports: list[str]
    setting: str                       #: the bus setting listened at, e.g. "19200 8E1"
    window_s: float = SILENCE_WINDOW_S
    _next_s: float = 0.0
    _bytes_at: list[int] = field(default_factory=list)
    _frames_at: int = 0
    _silent_ports: set[int] = field(default_factory=set)
    _no_frames: bool = False
    warned: list[str] = field(default_factory=list)

    def __post_init__(self) -> None:
        self._next_s = self.window_s
        self._bytes_at = [0] * len(self.ports)

    def _detect_hint(self) -> str:
        return f"run `buswitness detect {self.ports[0]}`" if self.ports else "run `buswitness detect`"

    def no_frames_text(self, seconds: float, nbytes: int) -> str:
        return (f"0 valid frames at {self.setting} in {_span(seconds)} ({nbytes} bytes received): check A/B wiring, "
                f"baud and format, or stop and {self._detect_hint()}")

    def no_bytes_text(self, port: str, seconds: float) -> str:
        return (f"{port}: no bytes at all in {_span(seconds)}: check that the adapter is wired to the bus (A/B, "
                f"common) and that the master is polling, or that this is the right port")

    def check(self, elapsed_s: float, port_bytes: list[int], valid_frames: int | None) -> list[str]:
        """Warnings due at ``elapsed_s`` (seconds since the start) for these running totals.

        ``valid_frames`` None: no decoder in this build, only bytes are checked.
        """
        out: list[str] = []
        if elapsed_s < self._next_s:
            return out
        span = self.window_s + (elapsed_s - self._next_s)
        self._next_s = elapsed_s + self.window_s
        for i, (name, now) in enumerate(zip(self.ports, port_bytes)):
            moved = now - self._bytes_at[i]
            self._bytes_at[i] = now
            if moved == 0 and i not in self._silent_ports:
                self._silent_ports.add(i)
                out.append(self.no_bytes_text(name, span) if now == 0 else
                           f"{name}: no bytes for {_span(span)} (after {now} bytes): the bus or the adapter went "
                           f"quiet; check the wiring and the master")
            elif moved and i in self._silent_ports:
                self._silent_ports.discard(i)
                out.append(f"{name}: bytes again")
        if valid_frames is not None:
            moved = valid_frames - self._frames_at
            self._frames_at = valid_frames
            total_bytes = sum(port_bytes)
            if moved == 0 and total_bytes and not self._no_frames and len(self._silent_ports) < len(self.ports):
                self._no_frames = True
                out.append(self.no_frames_text(span, total_bytes) if valid_frames == 0 else
                           f"0 valid frames at {self.setting} in the last {_span(span)} although bytes arrive: check "
                           f"A/B wiring, baud and format")
            elif moved and self._no_frames:
                self._no_frames = False
                out.append("valid frames again")
        self.warned.extend(out)
        return out

    def closing(self, elapsed_s: float, port_bytes: list[int], valid_frames: int | None) -> list[str]:
        """The lines the closing summary repeats: a recording with no bytes, or no valid frames, says so."""
        lines = []
        for name, n in zip(self.ports, port_bytes):
            if n == 0:
                lines.append("WARNING " + self.no_bytes_text(name, elapsed_s))
        total = sum(port_bytes)
        if valid_frames == 0 and total:
            lines.append("WARNING " + self.no_frames_text(elapsed_s, total))
        elif valid_frames is not None and total:
            lines.append(f"{valid_frames} valid frames at {self.setting}")
        return lines
