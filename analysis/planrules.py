"""The installation check: rules of the trade and of open standards applied to a bus description.

Each rule reads a ``BusPlan`` (analysis/busplan.py) and returns ``PlanResult``s: pass, warn or
fail, the numbers, the fix and the source. Sources are the keys of /work/shared/REFERENCES.md
(MSL = MODBUS over Serial Line V1.02; TIA/EIA-485-A facts as published in TI SLLA628 and AN-1057);
a rule of thumb says "common practice", a value recalled without a source says "from memory".
docs/plan.md lists every rule with the same sources.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict, dataclass, field

from buswitness.analysis.busplan import BusPlan, Device, Part, Repeater, Segment

STATUSES = ("fail", "warn", "pass")

#: Unit loads one segment takes (TIA/EIA-485-A: a driver delivers 1.5 V into 54 ohm, which is 32 unit
#: loads in parallel with two 120 ohm terminators, TI SLLA628; MSL §3.4.1).
MAX_UNIT_LOADS = 32
#: The Modbus bias resistors cost this many unit loads (MSL §3.4.6; TI AN-1057).
BIAS_UNIT_LOAD_COST = 4
#: Trunk length below about 100 kbit/s (TIA-422-B Annex A.1.1: 1200 m below 90 kbit/s with 24 AWG,
#: 52.5 pF/m; Renesas tutorial: 4000 ft up to 100 kbps, then about 10x shorter per 10x faster).
MAX_LENGTH_M = 1200.0
LENGTH_KNEE_BAUD = 100_000
#: The cable the TIA-422-B length curve assumes, pF per metre (TIA-422-B Annex A.1.1).
REFERENCE_PF_PER_M = 52.5
#: MSL §3.4.3: 1000 m at up to 9600 bps with AWG26 (and thinner) cable.
MSL_AWG26_LENGTH_M = 1000.0
MSL_AWG26_GAUGE = 26
#: Beyond the published length by this factor, no cable in common use carries the rate: fail rather
#: than warn (our margin, not a published figure).
LENGTH_FAIL_FACTOR = 1.5
#: Longest stub (derivation) to a device on the trunk (MSL §3.4.3: 20 m).
MAX_STUB_M = 20.0
#: A terminator or the master this close to a segment's end counts as at the end, m (common practice:
#: the terminator sits at the last device's terminals).
END_TOLERANCE_M = 1.0
#: Terminator within this share of the cable's impedance passes (MSL §3.4.5 itself offers 150 ohm for
#: line of the recommended >100 ohm, about 120 ohm, class: a quarter either way is in use) ...
TERMINATOR_PASS_SHARE = 0.25
#: ... and within this factor either way only warns; beyond it the mismatch reflects most of the signal
#: (common practice).
TERMINATOR_FAIL_FACTOR = 2.0
#: Cable impedance below which MSL asks for a better cable (MSL §3.4.5, §3.6: Z0 over 100 ohm preferred).
MIN_IMPEDANCE_OHM = 100.0
#: Bias resistors, each side (MSL §3.4.6: 450 to 650 ohm).
BIAS_OHM_RANGE = (450.0, 650.0)

SOURCES = {
    "unit-loads": "TIA/EIA-485-A (32 unit loads: 1.5 V into 54 ohm, TI SLLA628); MSL §3.4.1; bias costs 4: "
                  "MSL §3.4.6, TI AN-1057",
    "segment-length": "TIA-422-B Annex A.1.1 (1200 m below 90 kbit/s, 24 AWG, 52.5 pF/m); MSL §3.4.3 (1000 m "
                      "at up to 9600 bps with AWG26); Renesas RS-485 tutorial (about 10x shorter per 10x faster "
                      "above 100 kbps)",
    "termination": "MSL §3.4.5 (one terminator at each end of the trunk, none on stubs)",
    "terminator-value": "MSL §3.4.5 and §3.6 (150 ohm, or 120 ohm + 1 nF when biased; cable over 100 ohm); "
                        "matching the cable's impedance: common practice",
    "bias": "MSL §3.4.6 (pull-up on D1, pull-down on D0, 450-650 ohm, at one point only); NSC AN-847",
    "stub-length": "MSL §3.4.3 (stubs up to 20 m)",
    "topology": "MSL §3.4 (one trunk, devices daisy-chained or on short derivations: from memory); master at "
                "one end: common practice",
    "shield": "common practice (ground the shield at one point per segment)",
    "signal-common": "MSL §3.3.2 (a third conductor, the common, links every device, bonded to protective "
                     "earth at one point: from memory); TIA/EIA-485-A common-mode range -7 to +12 V (TI SLLA628)",
    "repeater": "MSL §3.4.1 (a repeater starts a new segment with its own 32 unit loads); placement: common "
                "practice",
    "ab-wiring": "MSL §3.3.2 (D0 = A, D1 = B); makers label A and B differently: common practice",
}

TITLES = {
    "unit-loads": "Unit loads per segment", "segment-length": "Segment length for the baud rate",
    "termination": "Terminators at the two ends of each segment", "terminator-value": "Terminator value",
    "bias": "Fail-safe bias at one point per segment", "stub-length": "Stub length",
    "topology": "Daisy chain, master at one end", "shield": "Shield grounded at one point",
    "signal-common": "Signal common present", "repeater": "Repeater placement", "ab-wiring": "A/B wiring",
}

#: Shown with every result whose fix is work on the wiring.
PLAN_CAUTION = (
    "Fitting or removing terminators and bias, shortening stubs or re-landing conductors is work inside "
    "panels, often near mains wiring and running machinery: isolate as your site requires and follow local "
    "electrical codes and licensed practice; ground potential differences between buildings can be hazardous."
)


@dataclass
class PlanResult:
    """One rule's verdict on one part of the bus."""

    rule: str
    status: str                        # fail / warn / pass
    subject: str                       # "segment 1 (0-420 m)", "Pump drive B (7)"
    statement: str
    numbers: dict = field(default_factory=dict)
    fix: str = ""
    source: str = ""
    caution: str = ""
    position_m: float | None = None    # where the drawing marks it
    devices: list[str] = field(default_factory=list)  # device keys concerned ("station 7", "master")
    segment: int | None = None

    def __post_init__(self) -> None:
        if self.status not in STATUSES:
            raise ValueError(f"status {self.status!r} is not one of {STATUSES}")
        self.source = self.source or SOURCES[self.rule]
        if self.status != "pass" and self.fix and not self.caution:
            self.caution = PLAN_CAUTION

    @property
    def title(self) -> str:
        return TITLES[self.rule]

    def to_dict(self) -> dict:
        return asdict(self)


def _g(x: float) -> str:
    return f"{x:g}"


# -- what sits on each segment ----------------------------------------------------------------

@dataclass
class _Point:
    """A terminator or bias network wherever it is fitted: in a device, a repeater side or on its own."""

    key: str            # device key concerned
    label: str
    position_m: float
    stub_m: float
    ohm: float | None


def _devices_on(plan: BusPlan, seg: Segment) -> list[Device]:
    return [d for d in plan.devices if plan.segment_of(d.position_m).index == seg.index]


def _repeater_sides(plan: BusPlan, seg: Segment) -> list[tuple[Repeater, str]]:
    """Repeaters touching the segment and which side of theirs faces it."""
    out = []
    for r in plan.repeaters:
        if seg.end_is_repeater and r.position_m == seg.end_m:
            out.append((r, "near"))
        if seg.start_is_repeater and r.position_m == seg.start_m:
            out.append((r, "far"))
    return out


def _parts_on(plan: BusPlan, seg: Segment, kind: str) -> list[Part]:
    return [p for p in plan.parts if p.kind == kind and plan.segment_of(p.position_m).index == seg.index]


def terminators_on(plan: BusPlan, seg: Segment) -> list[_Point]:
    pts = [_Point(d.key, d.label, d.position_m, d.stub_m, d.terminator_ohm)
           for d in _devices_on(plan, seg) if d.terminator]
    pts += [_Point(r.key, r.label, r.position_m, r.stub_m, r.terminator_ohm) for r, side in _repeater_sides(plan, seg)
            if (r.terminator_near if side == "near" else r.terminator_far)]
    pts += [_Point(p.key, f"terminator at {p.position_m:g} m", p.position_m, p.stub_m, p.ohm)
            for p in _parts_on(plan, seg, "terminator")]
    return pts


def bias_on(plan: BusPlan, seg: Segment) -> list[_Point]:
    pts = [_Point(d.key, d.label, d.position_m, d.stub_m, d.bias_ohm) for d in _devices_on(plan, seg) if d.bias]
    pts += [_Point(r.key, r.label, r.position_m, r.stub_m, r.bias_ohm) for r, side in _repeater_sides(plan, seg)
            if (r.bias_near if side == "near" else r.bias_far)]
    pts += [_Point(p.key, f"bias network at {p.position_m:g} m", p.position_m, p.stub_m, p.ohm)
            for p in _parts_on(plan, seg, "bias")]
    return pts


def unit_loads_on(plan: BusPlan, seg: Segment) -> float:
    return sum(d.unit_load for d in _devices_on(plan, seg)) + sum(r.unit_load for r, _ in _repeater_sides(plan, seg))


def _nearest_key(plan: BusPlan, seg: Segment, position_m: float) -> str:
    """The device or repeater closest to a point of the segment (for marking it in the drawing)."""
    things: list[tuple[float, str]] = [(abs(d.position_m - position_m), d.key) for d in _devices_on(plan, seg)]
    things += [(abs(r.position_m - position_m), r.key) for r, _ in _repeater_sides(plan, seg)]
    return min(things)[1] if things else ""


# -- the rules --------------------------------------------------------------------------------

def unit_loads(plan: BusPlan) -> list[PlanResult]:
    out = []
    for seg in plan.segments():
        total = unit_loads_on(plan, seg)
        biased = bool(bias_on(plan, seg))
        limit = MAX_UNIT_LOADS - (BIAS_UNIT_LOAD_COST if biased else 0)
        nums = {"unit_loads": round(total, 3), "limit": limit, "biased": biased,
                "devices": len(_devices_on(plan, seg))}
        if total > limit:
            out.append(PlanResult(
                "unit-loads", "fail", seg.name,
                f"{seg.name} carries {total:g} unit loads, over the {limit} one segment takes"
                f"{' with bias resistors' if biased else ''}: every receiver sees a weaker signal.",
                nums, "Split the trunk with a repeater so that each segment stays within the limit, or use devices "
                      "with fractional-load transceivers (1/2, 1/4, 1/8 unit load; see their datasheets).",
                position_m=(seg.start_m + seg.end_m) / 2, segment=seg.index))
        else:
            out.append(PlanResult("unit-loads", "pass", seg.name,
                                  f"{seg.name} carries {total:g} of the {limit} unit loads it takes.", nums,
                                  segment=seg.index))
    return out


def length_limit_m(plan: BusPlan) -> tuple[float, str]:
    """The published trunk length for this bus's baud rate and cable, and how it was reached."""
    baud = plan.baud or 0
    limit, how = MAX_LENGTH_M, "1200 m below 100 kbit/s"
    if baud > LENGTH_KNEE_BAUD:
        limit = MAX_LENGTH_M * LENGTH_KNEE_BAUD / baud
        how = f"1200 m x 100 kbit/s / {baud} bps"
    gauge = plan.cable.gauge_awg
    if gauge is not None and gauge >= MSL_AWG26_GAUGE and limit > MSL_AWG26_LENGTH_M:
        limit, how = MSL_AWG26_LENGTH_M, f"1000 m for AWG{gauge} cable (MSL §3.4.3)"
    pf = plan.cable.capacitance_pf_per_m
    if pf is not None and pf > REFERENCE_PF_PER_M:
        limit *= REFERENCE_PF_PER_M / pf
        how += f", x {REFERENCE_PF_PER_M:g}/{pf:g} pF/m for this cable's capacitance"
    return limit, how


def segment_length(plan: BusPlan) -> list[PlanResult]:
    limit, how = length_limit_m(plan)
    rate = f"{plan.baud} bps" if plan.baud else "an unstated baud rate"
    out = []
    for seg in plan.segments():
        nums = {"length_m": round(seg.length_m, 1), "limit_m": round(limit, 1), "baud": plan.baud,
                "how": how}
        if seg.length_m > LENGTH_FAIL_FACTOR * limit:
            status = "fail"
        elif seg.length_m > limit:
            status = "warn"
        else:
            out.append(PlanResult("segment-length", "pass", seg.name,
                                  f"{seg.name} is {seg.length_m:g} m, within {limit:.0f} m at {rate}.", nums,
                                  segment=seg.index))
            continue
        out.append(PlanResult(
            "segment-length", status, seg.name,
            f"{seg.name} is {seg.length_m:g} m long, over the {limit:.0f} m published for {rate} ({how}).",
            nums, "Lower the baud rate, use a cable of lower capacitance and heavier gauge, or split the trunk "
                  "with a repeater.", position_m=seg.end_m, devices=[_nearest_key(plan, seg, seg.end_m)],
            segment=seg.index))
    return out


def termination(plan: BusPlan) -> list[PlanResult]:
    out = []
    for seg in plan.segments():
        pts = terminators_on(plan, seg)
        at_end: dict[str, list[_Point]] = {"start": [], "end": []}
        for pt in pts:
            where = None
            if pt.stub_m > END_TOLERANCE_M:
                out.append(PlanResult(
                    "termination", "fail", pt.label,
                    f"{pt.label} has its terminator switched on at the end of a {pt.stub_m:g} m stub: "
                    f"a terminator on a stub loads the line and reflects at the junction.",
                    {"position_m": pt.position_m, "stub_m": pt.stub_m},
                    "Switch this terminator off; terminate only the two ends of the trunk.",
                    position_m=pt.position_m, devices=[pt.key], segment=seg.index))
                continue
            if abs(pt.position_m - seg.start_m) <= END_TOLERANCE_M:
                where = "start"
            elif abs(pt.position_m - seg.end_m) <= END_TOLERANCE_M:
                where = "end"
            if where is None:
                out.append(PlanResult(
                    "termination", "fail", pt.label,
                    f"{pt.label} has a terminator in mid-trunk at {pt.position_m:g} m, between the ends of {seg.name}: "
                    f"it loads the line and the signal reflects from it.",
                    {"position_m": pt.position_m, "segment_start_m": seg.start_m, "segment_end_m": seg.end_m},
                    "Switch this terminator off; keep one at each end of the segment.",
                    position_m=pt.position_m, devices=[pt.key], segment=seg.index))
            else:
                at_end[where].append(pt)
        for where, pos in (("start", seg.start_m), ("end", seg.end_m)):
            here = at_end[where]
            side = "master's end" if where == "start" and seg.index == 1 else (
                "far end" if where == "end" and not seg.end_is_repeater else f"{where} ({pos:g} m)")
            key = _nearest_key(plan, seg, pos)
            if not here:
                out.append(PlanResult(
                    "termination", "fail", seg.name,
                    f"{seg.name} has no terminator at its {side} ({pos:g} m): the signal reflects from the open "
                    f"end, worst for the stations near it.",
                    {"end_m": pos, "terminators_on_segment": len(pts)},
                    f"Switch on the built-in terminator of the last device at {pos:g} m, or fit a "
                    f"{plan.cable.impedance_ohm:g} ohm resistor across D0-D1 there.",
                    position_m=pos, devices=[key] if key else [], segment=seg.index))
            elif len(here) > 1:
                out.append(PlanResult(
                    "termination", "fail", seg.name,
                    f"{seg.name} has {len(here)} terminators at its {side} ({', '.join(p.label for p in here)}): "
                    f"they load the line as one of half the value.",
                    {"end_m": pos, "terminators_here": len(here)},
                    "Keep one terminator at this end; switch the other(s) off.",
                    position_m=pos, devices=[p.key for p in here], segment=seg.index))
        if not any(r.rule == "termination" and r.segment == seg.index and r.status == "fail" for r in out):
            out.append(PlanResult("termination", "pass", seg.name,
                                  f"{seg.name} has one terminator at each end and none elsewhere.",
                                  {"terminators": len(pts)}, segment=seg.index))
    return out


def terminator_value(plan: BusPlan) -> list[PlanResult]:
    z0 = plan.cable.impedance_ohm
    out = []
    if z0 < MIN_IMPEDANCE_OHM:
        out.append(PlanResult(
            "terminator-value", "warn", "cable",
            f"The cable's impedance, {z0:g} ohm, is under the {MIN_IMPEDANCE_OHM:g} ohm the serial-line guide "
            f"prefers.", {"impedance_ohm": z0, "preferred_over_ohm": MIN_IMPEDANCE_OHM},
            "Use a twisted pair of about 120 ohm for this bus when the cable is next replaced."))
    for seg in plan.segments():
        for pt in terminators_on(plan, seg):
            if pt.ohm is None:
                continue
            ratio = pt.ohm / z0
            nums = {"terminator_ohm": pt.ohm, "cable_impedance_ohm": z0, "ratio": round(ratio, 3)}
            if abs(ratio - 1) <= TERMINATOR_PASS_SHARE:
                out.append(PlanResult("terminator-value", "pass", pt.label,
                                      f"{pt.label}: {pt.ohm:g} ohm terminator on {z0:g} ohm cable.", nums,
                                      segment=seg.index, devices=[pt.key]))
                continue
            status = "fail" if max(ratio, 1 / ratio) > TERMINATOR_FAIL_FACTOR else "warn"
            out.append(PlanResult(
                "terminator-value", status, pt.label,
                f"{pt.label}: a {pt.ohm:g} ohm terminator on {z0:g} ohm cable does not match its impedance; "
                f"part of the signal reflects.", nums,
                f"Fit a terminator of the cable's impedance ({z0:g} ohm; MSL §3.4.5: 150 ohm, or 120 ohm + 1 nF "
                f"when the line is biased).", position_m=pt.position_m, devices=[pt.key], segment=seg.index))
    return out


def bias(plan: BusPlan) -> list[PlanResult]:
    out = []
    lo, hi = BIAS_OHM_RANGE
    for seg in plan.segments():
        pts = bias_on(plan, seg)
        nums = {"bias_points": len(pts), "where_m": [p.position_m for p in pts]}
        if len(pts) > 1:
            out.append(PlanResult(
                "bias", "fail", seg.name,
                f"{seg.name} is biased at {len(pts)} points ({', '.join(p.label for p in pts)}): the bias "
                f"resistors add up in parallel and load every driver.", nums,
                "Keep the bias network at one point of the segment (often the master's end) and switch the "
                "others off.", position_m=pts[1].position_m, devices=[p.key for p in pts], segment=seg.index))
        elif not pts:
            out.append(PlanResult(
                "bias", "warn", seg.name,
                f"{seg.name} has no bias network: the idle line floats inside the receivers' undefined band "
                f"unless every receiver is of a fail-safe type.", nums,
                f"Check the devices' datasheets for fail-safe receivers; if not all are, fit one bias network "
                f"({lo:g}-{hi:g} ohm each side) at one point, usually the master's end.",
                position_m=seg.start_m, segment=seg.index))
        else:
            p = pts[0]
            if p.ohm is not None and not lo <= p.ohm <= hi:
                out.append(PlanResult(
                    "bias", "warn", seg.name,
                    f"{seg.name} is biased at one point ({p.label}) with {p.ohm:g} ohm, outside {lo:g}-{hi:g} ohm.",
                    {**nums, "bias_ohm": p.ohm}, f"Use {lo:g}-{hi:g} ohm pull-up and pull-down resistors.",
                    position_m=p.position_m, devices=[p.key], segment=seg.index))
            else:
                out.append(PlanResult("bias", "pass", seg.name, f"{seg.name} is biased at one point ({p.label}).",
                                      nums, segment=seg.index, devices=[p.key]))
    return out


def stub_length(plan: BusPlan) -> list[PlanResult]:
    out = []
    items: list[tuple[str, str, float, float]] = [(d.key, d.label, d.position_m, d.stub_m) for d in plan.devices]
    items += [(p.key, f"{p.kind} at {p.position_m:g} m", p.position_m, p.stub_m) for p in plan.parts]
    longest = max((s for _, _, _, s in items), default=0.0)
    for key, label, pos, stub in items:
        if stub > MAX_STUB_M:
            out.append(PlanResult(
                "stub-length", "fail", label,
                f"{label} hangs on a {stub:g} m stub, over the {MAX_STUB_M:g} m allowed: the stub reflects and "
                f"its device sees a distorted signal.", {"stub_m": stub, "limit_m": MAX_STUB_M, "position_m": pos},
                "Bring the trunk to the device (in and out at its terminals) or move the junction nearer, so the "
                f"drop is at most {MAX_STUB_M:g} m.", position_m=pos, devices=[key],
                segment=plan.segment_of(pos).index))
    if not out:
        out.append(PlanResult("stub-length", "pass", "all devices",
                              f"Every stub is within {MAX_STUB_M:g} m (longest {longest:g} m).",
                              {"longest_stub_m": longest, "limit_m": MAX_STUB_M}))
    return out


def topology(plan: BusPlan) -> list[PlanResult]:
    out = []
    if plan.ring:
        start, end = plan.trunk_span()
        out.append(PlanResult(
            "topology", "fail", "trunk",
            "The trunk is closed into a ring: a ring has no ends to terminate, and every signal arrives twice.",
            {"ring": True}, "Open the ring at one point, so that the trunk has two ends, and terminate both.",
            position_m=end))
    junctions: dict[float, list[Device]] = {}
    for d in plan.devices:
        if d.stub_m > MAX_STUB_M:
            junctions.setdefault(round(d.position_m), []).append(d)
    for pos, arms in sorted(junctions.items()):
        if len(arms) >= 2:
            out.append(PlanResult(
                "topology", "fail", f"junction at {pos:g} m",
                f"{len(arms)} long arms leave the trunk at {pos:g} m ({', '.join(d.label for d in arms)}): a star, "
                f"not a daisy chain.", {"arms": len(arms), "arm_lengths_m": [d.stub_m for d in arms]},
                "Rewire as one chain that passes through every device in turn; terminate its two ends.",
                position_m=float(pos), devices=[d.key for d in arms], segment=plan.segment_of(pos).index))
    m = plan.master
    if m is not None:
        seg = plan.segment_of(m.position_m)
        off = min(abs(m.position_m - seg.start_m), abs(m.position_m - seg.end_m))
        if off > END_TOLERANCE_M:
            out.append(PlanResult(
                "topology", "warn", m.label,
                f"The master sits at {m.position_m:g} m, {off:g} m from the nearest end of {seg.name}: it works "
                f"when both ends are terminated, but positions and distances in reports read from one end.",
                {"master_m": m.position_m, "from_end_m": off},
                "Prefer the master at one end of the trunk; if it stays, check the terminators at both ends.",
                position_m=m.position_m, devices=[m.key], segment=seg.index))
    elif plan.stations:
        out.append(PlanResult("topology", "warn", "master", "The description has no [master] table.",
                              {}, "Add [master] with its position_m so that the chain can be judged."))
    if not out:
        out.append(PlanResult("topology", "pass", "trunk", "A daisy chain with the master at one end.",
                              {"segments": len(plan.segments())}))
    return out


def shield(plan: BusPlan) -> list[PlanResult]:
    if plan.shield_grounds_m is None:
        return [PlanResult("shield", "warn", "shield", "The description does not say where the shield is grounded.",
                           {}, "Find the shield's ground connections and add [shield] grounded_at_m = [...].")]
    out = []
    for seg in plan.segments():
        here = [g for g in plan.shield_grounds_m if plan.segment_of(g).index == seg.index]
        nums = {"ground_points": len(here), "grounded_at_m": here}
        if len(here) == 1:
            out.append(PlanResult("shield", "pass", seg.name, f"{seg.name}: shield grounded at {here[0]:g} m.",
                                  nums, segment=seg.index))
        elif not here:
            out.append(PlanResult(
                "shield", "warn", seg.name, f"{seg.name}: the shield is grounded nowhere, so it does not screen.",
                nums, "Bond the shield to protective earth at one point of the segment, usually the master's end.",
                position_m=seg.start_m, segment=seg.index))
        else:
            out.append(PlanResult(
                "shield", "warn", seg.name,
                f"{seg.name}: the shield is grounded at {len(here)} points ({', '.join(_g(g) for g in here)} m); "
                f"ground currents between them flow in it and couple into the pair.", nums,
                "Keep one ground point per segment and insulate the shield at the others; where local codes "
                "require both ends, ask about a capacitor at one of them.",
                position_m=here[1], segment=seg.index))
    return out


def signal_common(plan: BusPlan) -> list[PlanResult]:
    if plan.signal_common is None:
        return [PlanResult("signal-common", "warn", "bus", "The description does not say whether a signal common "
                           "runs with the pair.", {}, "Check the cable and add signal_common = true or false to [bus].")]
    if not plan.signal_common:
        return [PlanResult(
            "signal-common", "fail", "bus",
            "No signal common runs with the pair: the devices' grounds may differ by more than the receivers' "
            "-7 to +12 V common-mode range, and the pair then carries return currents.", {"signal_common": False},
            "Run a third conductor (a spare core of the cable) as the signal common to every device, connected to "
            "protective earth at one point.", position_m=plan.trunk_span()[0])]
    out = []
    for d in plan.devices:
        if d.common is False:
            out.append(PlanResult(
                "signal-common", "fail", d.label,
                f"{d.label}: the signal common runs with the pair but is not landed at this device, so its "
                f"receiver's ground floats against the others'.", {"common_at_device": False},
                "Land the common core on the device's signal-common (0 V, GND or C) terminal.",
                position_m=d.position_m, devices=[d.key], segment=plan.segment_of(d.position_m).index))
    earthed = plan.common_earthed_at_m
    if earthed is not None and len(earthed) != 1:
        out.append(PlanResult(
            "signal-common", "warn", "bus",
            ("The signal common is bonded to earth nowhere." if not earthed else
             f"The signal common is bonded to earth at {len(earthed)} points ({', '.join(_g(g) for g in earthed)} m): "
             f"ground currents between them flow in it."), {"earthed_at_m": earthed},
            "Bond the signal common to protective earth at one point only, usually at the master.",
            position_m=earthed[1] if len(earthed) > 1 else plan.trunk_span()[0]))
    if not out:
        where = "" if not earthed else f", bonded to earth at {earthed[0]:g} m"
        out.append(PlanResult("signal-common", "pass", "bus",
                              f"A signal common runs with the pair to every device{where}.",
                              {"signal_common": True, "earthed_at_m": earthed}))
    return out


def repeater(plan: BusPlan) -> list[PlanResult]:
    out = []
    segs = plan.segments()
    for r in plan.repeaters:
        beyond = [s for s in segs if s.start_is_repeater and s.start_m == r.position_m]
        devices_beyond = _devices_on(plan, beyond[0]) if beyond else []
        if r.stub_m > END_TOLERANCE_M:
            out.append(PlanResult(
                "repeater", "fail", r.label,
                f"{r.label} hangs on a {r.stub_m:g} m stub: both of its sides are segment ends and belong on the "
                f"trunk.", {"stub_m": r.stub_m}, "Wire the repeater in line with the trunk.",
                position_m=r.position_m, devices=[r.key]))
        elif not devices_beyond:
            out.append(PlanResult(
                "repeater", "warn", r.label, f"{r.label} at {r.position_m:g} m has no device beyond it.",
                {"devices_beyond": 0}, "Check the description; a repeater with nothing beyond it only adds a load.",
                position_m=r.position_m, devices=[r.key]))
        else:
            out.append(PlanResult("repeater", "pass", r.label,
                                  f"{r.label} at {r.position_m:g} m, {len(devices_beyond)} device(s) beyond it.",
                                  {"devices_beyond": len(devices_beyond)}, devices=[r.key]))
    return out


def ab_wiring(plan: BusPlan) -> list[PlanResult]:
    out = []
    for d in plan.devices:
        if d.label_a != d.wire_on_a:
            master = d.key == "master"
            out.append(PlanResult(
                "ab-wiring", "fail", d.label,
                f"{d.label}: its terminal A is {d.label_a} by its maker's labels, but {d.wire_on_a} is landed on it: "
                f"the pair is reversed at this device" + (", so no station can understand the master." if master
                                                          else ", so it cannot understand the master."),
                {"label_a": d.label_a, "wire_on_a": d.wire_on_a},
                "With the device isolated, swap its two signal conductors (D0 and D1) at its terminals.",
                position_m=d.position_m, devices=[d.key], segment=plan.segment_of(d.position_m).index))
    if not out:
        out.append(PlanResult("ab-wiring", "pass", "all devices", "Every device has D0 and D1 on the terminals its "
                              "maker labels for them.", {"devices": len(plan.devices)}))
    return out


Rule = Callable[[BusPlan], list[PlanResult]]

#: Every rule of the installation check, in the order the report shows them.
RULES: dict[str, Rule] = {
    "unit-loads": unit_loads,
    "segment-length": segment_length,
    "termination": termination,
    "terminator-value": terminator_value,
    "bias": bias,
    "stub-length": stub_length,
    "topology": topology,
    "shield": shield,
    "signal-common": signal_common,
    "repeater": repeater,
    "ab-wiring": ab_wiring,
}


def check_plan(plan: BusPlan) -> list[PlanResult]:
    """Every rule's results: failures first, then warnings, then passes, each in rule order."""
    order = list(RULES)
    found = [r for rule in RULES.values() for r in rule(plan)]
    return sorted(found, key=lambda r: (STATUSES.index(r.status), order.index(r.rule)))


def counts(results: list[PlanResult]) -> dict[str, int]:
    return {s: sum(1 for r in results if r.status == s) for s in STATUSES}


__all__ = ["PLAN_CAUTION", "RULES", "SOURCES", "PlanResult", "check_plan", "counts"]
