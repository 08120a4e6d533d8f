"""The fleet dataset as a sink: one capture's tables and figures into DIR (analysis/dataset.py, docs/fleet.md)."""

from __future__ import annotations

from buswitness.analysis.dataset import DatasetSink

__all__ = ["DatasetSink"]
