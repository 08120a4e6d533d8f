"""transactions.csv, frames.csv, events.csv and their Parquet twins.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import os

import pandas as pd
import pytest
from buswitness.analysis.exports import TRANSACTION_COLUMNS
from buswitness.analysis.pipeline import AnalysisOptions, analyze_tables
from test_analysis_support import Tx, header, tables

TXS = [Tx(1.0, 7, "ok", 180.0), Tx(2.0, 7, "timeout"), Tx(3.0, 7, "late", 240.0)]
EVENTS = [(2.5, "crc_error", 7, b"\x07\x03\x04\x00")]


def test_transactions_csv_has_one_row_per_transaction_with_the_issue_columns(tmp_path):
    analyze_tables(header(), [tables(TXS, EVENTS)], AnalysisOptions(csv_dir=str(tmp_path)))
    tx = pd.read_csv(tmp_path / "transactions.csv", keep_default_na=False)
    assert tuple(tx.columns) == TRANSACTION_COLUMNS
    assert tx["outcome"].tolist() == ["ok", "timeout", "late"]
    assert tx["t_request_end_s"].tolist() == [1.0, 2.0, 3.0]
    assert tx["utc"][0] == "2026-03-04T21:00:01.000000+00:00"
    assert float(tx["response_ms"][0]) == pytest.approx(180.0) and tx["response_ms"][1] == ""
    assert float(tx["response_ms_low"][0]) == pytest.approx(179.0)
    assert float(tx["response_ms_high"][0]) == pytest.approx(181.0)
    assert tx["request_hex"][0].startswith("07 03 00 00 00 02") and tx["response_hex"][2].startswith("07 03 04")
    ev = pd.read_csv(tmp_path / "events.csv")
    assert ev["kind"].tolist() == ["crc_error"] and ev["hex"][0] == "07 03 04 00"
    frames = pd.read_csv(tmp_path / "frames.csv")
    assert frames["direction"].tolist() == ["request", "response", "request", "request", "response"]


def test_parquet_holds_the_same_tables(tmp_path):
    analyze_tables(header(), [tables(TXS, EVENTS)], AnalysisOptions(csv_dir=str(tmp_path / "c"),
                                                                     parquet_dir=str(tmp_path / "p")))
    pq = pd.read_parquet(tmp_path / "p" / "transactions.parquet")
    csv = pd.read_csv(tmp_path / "c" / "transactions.csv")
    assert pq["outcome"].tolist() == csv["outcome"].tolist() and len(pd.read_parquet(tmp_path / "p" / "frames.parquet")) == 5


def test_utc_columns_are_timestamps_with_their_zone_in_csv_and_parquet(tmp_path):
    analyze_tables(header(), [tables(TXS, EVENTS)], AnalysisOptions(csv_dir=str(tmp_path / "c"),
                                                                     parquet_dir=str(tmp_path / "p")))
    want = pd.Timestamp("2026-03-04T21:00:01", tz="UTC")
    for name in ("transactions", "frames", "events"):
        pq = pd.read_parquet(tmp_path / "p" / f"{name}.parquet")
        assert str(pq["utc"].dtype) == "datetime64[ns, UTC]", name
        csv = pd.read_csv(tmp_path / "c" / f"{name}.csv", parse_dates=["utc"])
        assert str(csv["utc"].dtype).endswith("UTC]"), name       # the offset is in the text: read as zoned
        assert (csv["utc"] == pq["utc"].dt.floor("us")).all(), name    # CSV keeps microseconds
    tx = pd.read_parquet(tmp_path / "p" / "transactions.parquet")
    assert tx["utc"].iloc[0] == want


def test_utc_is_empty_not_invented_when_the_capture_has_no_wall_clock(tmp_path):
    analyze_tables(header(start_utc=""), [tables(TXS, EVENTS)], AnalysisOptions(csv_dir=str(tmp_path / "c"),
                                                               parquet_dir=str(tmp_path / "p")))
    assert pd.read_parquet(tmp_path / "p" / "transactions.parquet")["utc"].isna().all()
    assert pd.read_csv(tmp_path / "c" / "transactions.csv", keep_default_na=False)["utc"].eq("").all()


def test_empty_capture_still_writes_headed_tables(tmp_path):
    analyze_tables(header(), [], AnalysisOptions(csv_dir=str(tmp_path)))
    assert (tmp_path / "transactions.csv").read_text().startswith("t_request_end_s,utc,station")


def test_a_failed_run_leaves_earlier_exports_untouched(tmp_path):
    (tmp_path / "transactions.csv").write_text("earlier\n")

    def broken():
        yield tables(TXS)
        raise RuntimeError("decoder fell over")

    with pytest.raises(RuntimeError):
        analyze_tables(header(), broken(), AnalysisOptions(csv_dir=str(tmp_path), block_rows=1))
    assert (tmp_path / "transactions.csv").read_text() == "earlier\n"
    assert [p for p in os.listdir(tmp_path) if p.endswith(".part")] == []
