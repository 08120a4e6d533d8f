"""Analysis: per-station figures, findings, the HTML dashboard, the evidence report and exports.

    from buswitness.analysis import AnalysisOptions, analyze
    result = analyze(open_capture("night.bwcap"), AnalysisOptions(timeout_ms=200))
    result.stations[0].response_ms["p95"]

Names load on first use, so that ``record`` (which needs only ``analysis.rolling``) does not
pay for pandas and plotly at start-up.
"""

from importlib import import_module
from typing import Any

_HOME = {
    "AnalysisOptions": "pipeline", "analyze": "pipeline", "analyze_tables": "pipeline",
    "AnalysisResult": "result", "BusFigures": "result", "StationFigures": "result",
    "StationInfo": "stationmap", "StationMap": "stationmap", "load_station_map": "stationmap",
    "TimeoutEstimate": "timeout", "merge_results": "result", "Figures": "figures",
}


def __getattr__(name: str) -> Any:
    if name in _HOME:
        return getattr(import_module(f"buswitness.analysis.{_HOME[name]}"), name)
    raise AttributeError(f"module 'buswitness.analysis' has no attribute {name!r}")


__all__ = ["AnalysisOptions", "AnalysisResult", "BusFigures", "Figures", "StationFigures", "StationInfo", "StationMap",
           "TimeoutEstimate", "analyze", "analyze_tables", "load_station_map", "merge_results"]
