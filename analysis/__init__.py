"""Analysis: per-station figures, findings, the HTML dashboard, the evidence report and exports.

    from buswitness.analysis import AnalysisOptions, analyze
    result = analyze(open_capture("night.bwcap"), AnalysisOptions(timeout_ms=200))
    result.stations[0].response_ms["p95"]
"""

from buswitness.analysis.pipeline import AnalysisOptions, analyze, analyze_tables
from buswitness.analysis.result import AnalysisResult, BusFigures, StationFigures
from buswitness.analysis.stationmap import StationInfo, StationMap, load_station_map
from buswitness.analysis.timeout import TimeoutEstimate

__all__ = ["AnalysisOptions", "AnalysisResult", "BusFigures", "StationFigures", "StationInfo", "StationMap",
           "TimeoutEstimate", "analyze", "analyze_tables", "load_station_map"]
