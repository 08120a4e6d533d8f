"""Profibus DP figures the generic per-station figures do not hold, from the decoder's tables.

Per slave: drop-outs (the master goes from data exchange to diagnosis requests after an
unanswered request), re-parameterisations (set-parameter requests on SAP 61), check-
configuration requests (SAP 62), diagnosis flags (answers with "data high": the slave has a
diagnosis waiting), answer time in bit times (p50, p95, max of the midpoints, and the widest
interval the timestamps allow). Per master: tokens passed and the token rotation time (from
one token it sends to its next; the wire shows when a master passes the token on, and the
rotation is the same interval seen one hop later). Per address: answers in two shapes (two
stations set to one address).

Built block by block (``add``) so memory does not grow with the capture.
"""

from __future__ import annotations

from collections import defaultdict

import numpy as np
from buswitness.decode.protocols.profibus_dp.fdl import (
    HIGH_PRIORITY,
    SAP_CHK_CFG,
    SAP_DIAG,
    SAP_SET_PRM,
    SD4,
    parse,
)

_ANSWERED = ("ok", "exception", "late")


class ProfibusFigures:
    def __init__(self, bit_ns: float, target_rotation_ms: float | None = None) -> None:
        self.bit_ns = bit_ns
        self.target_rotation_ms = target_rotation_ms
        self.slaves: dict[int, dict] = defaultdict(lambda: {"dropouts": 0, "reparameterisations": 0,
                                                            "config_checks": 0, "diagnosis_requests": 0, "retries": 0,
                                                            "diagnosis_flags": 0, "answer_bits": [],
                                                            "answer_bits_halfwidth": 0.0, "answer_shapes": set()})
        self._last: dict[int, tuple[bool, bool]] = {}  # slave -> (last request was data exchange, answered)
        self.masters: dict[int, dict] = defaultdict(lambda: {"tokens": 0, "rotation_ms": []})
        self._last_token: dict[int, int] = {}

    def add(self, frames, transactions, events=None) -> None:
        if len(frames):
            fn = frames["function"].to_numpy()
            tok = np.flatnonzero(fn == SD4)
            if tok.size:
                t_end = frames["t_end_ns"].to_numpy()[tok]
                raws = frames["raw"].to_numpy()[tok]
                for t, raw in zip(t_end.tolist(), raws):
                    master = raw[2] & 0x7F
                    m = self.masters[master]
                    m["tokens"] += 1
                    prev = self._last_token.get(master)
                    if prev is not None:
                        m["rotation_ms"].append((t - prev) / 1e6)
                    self._last_token[master] = t
        if not len(transactions):
            return
        outcome = transactions["outcome"].astype(str).to_numpy()
        retry = transactions["retry"].to_numpy(bool)
        rt = transactions["response_ms"].to_numpy(float)
        lo = transactions["response_ms_low"].to_numpy(float)
        hi = transactions["response_ms_high"].to_numpy(float)
        for k, (req_raw, rsp_raw) in enumerate(zip(transactions["request_raw"], transactions["response_raw"])):
            req = parse(req_raw)
            if req is None or outcome[k] == "broadcast":
                continue
            s = self.slaves[req.da]
            answered = outcome[k] in _ANSWERED
            data_exchange = req.dsap < 0
            prev = self._last.get(req.da)
            s["retries"] += bool(retry[k])
            if req.dsap == SAP_DIAG:
                s["diagnosis_requests"] += 1
                if prev is not None and prev[0] and not prev[1]:
                    s["dropouts"] += 1
            elif req.dsap == SAP_SET_PRM:
                s["reparameterisations"] += 1
            elif req.dsap == SAP_CHK_CFG:
                s["config_checks"] += 1
            self._last[req.da] = (data_exchange, answered)
            if answered and rsp_raw:
                rsp = parse(rsp_raw)
                if rsp is not None and rsp.kind == "response":
                    if rsp.function in HIGH_PRIORITY:
                        s["diagnosis_flags"] += 1
                    if data_exchange and len(s["answer_shapes"]) < 8:
                        s["answer_shapes"].add((req.dsap, rsp.sd, len(rsp.du)))
                if np.isfinite(rt[k]):
                    bits = rt[k] * 1e6 / self.bit_ns
                    if len(s["answer_bits"]) < 200_000:
                        s["answer_bits"].append(bits)
                    s["answer_bits_halfwidth"] = max(s["answer_bits_halfwidth"],
                                                     (hi[k] - lo[k]) * 1e6 / self.bit_ns / 2)

    def result(self) -> dict:
        slaves = {}
        for a, s in sorted(self.slaves.items()):
            bits = np.asarray(s["answer_bits"], float)
            slaves[a] = {
                "dropouts": s["dropouts"], "reparameterisations": s["reparameterisations"],
                "config_checks": s["config_checks"], "retries": s["retries"], "diagnosis_requests": s["diagnosis_requests"],
                "diagnosis_flags": s["diagnosis_flags"],
                "answer_bits": ({"p50": round(float(np.percentile(bits, 50)), 1),
                                 "p95": round(float(np.percentile(bits, 95)), 1),
                                 "max": round(float(bits.max()), 1),
                                 "halfwidth": round(s["answer_bits_halfwidth"], 1)} if bits.size else None),
                "answer_shapes": len({shape[2] for shape in s["answer_shapes"]}),
            }
        masters = {}
        for a, m in sorted(self.masters.items()):
            r = np.asarray(m["rotation_ms"], float)
            masters[a] = {"tokens": m["tokens"],
                          "rotation_ms": ({"p50": round(float(np.percentile(r, 50)), 3),
                                           "p95": round(float(np.percentile(r, 95)), 3),
                                           "max": round(float(r.max()), 3)} if r.size else None),
                          "over_target": (int((r > self.target_rotation_ms).sum())
                                          if r.size and self.target_rotation_ms else None)}
        return {"protocol": "profibus-dp", "slaves": slaves, "masters": masters,
                "target_rotation_ms": self.target_rotation_ms}

    def findings(self) -> list[dict]:
        """Plain findings (kind, station, sentence) from the figures."""
        out = []
        res = self.result()
        for a, s in res["slaves"].items():
            if s["dropouts"] >= 2:
                out.append({"kind": "keeps_dropping_out", "station": a,
                            "text": f"slave {a} dropped out {s['dropouts']} times and was re-parameterised "
                                    f"{s['reparameterisations']} times"})
            if s["retries"] >= 3:
                out.append({"kind": "needs_retries", "station": a,
                            "text": f"the master repeated {s['retries']} telegrams to slave {a} (the same frame "
                                    f"count bit after the slot time): answers are lost on the way"})
            if s["answer_shapes"] > 1:
                out.append({"kind": "two_on_one_address", "station": a,
                            "text": f"slave {a} answers data exchange with {s['answer_shapes']} different data "
                                    f"lengths: two stations may be set to address {a}"})
        for a, m in res["masters"].items():
            if m["over_target"]:
                out.append({"kind": "rotation_over_target", "station": a,
                            "text": f"master {a}: token rotation over the target of "
                                    f"{res['target_rotation_ms']:g} ms {m['over_target']} times "
                                    f"(max {m['rotation_ms']['max']:g} ms)"})
        return out
