"""Analysis: per-station figures, findings, the HTML dashboard, the evidence report and exports."""
