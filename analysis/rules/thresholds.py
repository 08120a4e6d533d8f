"""The thresholds every findings rule reads, each with the reason it has the value it has.

Rules take a ``Thresholds`` (defaults: the constants below) so a test can move one edge and
pin it. "common practice" marks a rule of thumb of the trade with no single source; source
keys are those of ../shared/REFERENCES.md (MSL = Modbus over Serial Line V1.02, MAP = Modbus
Application Protocol V1.1b3).
"""

from __future__ import annotations

from dataclasses import dataclass

# -- how much traffic a pattern needs ---------------------------------------------------------------
#: Polls to one station before a share of them is reported (common practice: two misses in ten
#: polls is chance; in twenty it starts to be a pattern).
MIN_REQUESTS = 20
#: Events of one kind before they are called a pattern rather than an accident (common practice).
MIN_EVENTS = 3

# -- late answers and the master's timeout ----------------------------------------------------------
#: Late answers or answers over the timeout before a station is called slow (common practice).
LATE_MIN_COUNT = 3
#: Share of polls missed or answered late that makes it a warning (common practice: a master with
#: one retry hides rarer misses; one poll in a hundred shows as stale values in the control room).
LATE_WARNING_SHARE = 0.01
#: Share of polls lost (timeouts and late) that makes it critical (common practice: one in five
#: polls lost and the values it carries can no longer be trusted for control).
LATE_CRITICAL_SHARE = 0.20
#: The slowest answers a master should still take: the suggested timeout covers this quantile of
#: the measured response times (common practice: cover all but the rarest one in a thousand, so
#: one freak answer does not stretch every poll cycle) ...
SUGGEST_QUANTILE = 0.999
#: ... with this margin on top (common practice: 25 %).
TIMEOUT_MARGIN = 1.25
#: Usual timeout settings, ms; a suggestion is rounded up to the next of them (common practice).
TIMEOUT_STEPS_MS = (50, 100, 150, 200, 250, 300, 400, 500, 600, 750, 1000, 1500, 2000, 3000, 5000, 10000)
#: p99 of the response time above this share of the timeout leaves too little headroom
#: (common practice: a device whose slow answers use 80 % of the timeout will soon cross it).
HEADROOM_SHARE = 0.8

# -- silent and absent stations ---------------------------------------------------------------------
#: A minute in which at most this share of polls was answered counts as silent (common practice:
#: a station that answers one poll in twenty is off the bus for that minute's purposes).
SILENT_DARK_SHARE = 0.05
#: A minute next to a silent one that answered less than this share holds the edge of the
#: silence; its start or end is placed within that minute in proportion (common practice).
SILENT_EDGE_SHARE = 0.95
#: A silence at least this long is critical rather than a warning (common practice: five minutes
#: without a value outlasts the hold time of most control loops).
SILENT_CRITICAL_S = 300.0

# -- a line the sniffer cannot read -----------------------------------------------------------------
#: When bytes that form no valid frame fill at least this share of the line's busy time, the line
#: is unreadable to the sniffer as configured (common practice: a bus that works for its master is
#: mostly valid frames; even one station of three answering garbled keeps valid frames over half).
UNREADABLE_DAMAGE_SHARE = 0.75
#: Breaks among the damage events that put a swapped A/B first: with A and B swapped the idle line
#: holds the receiver at space, which a UART reports as a break (common practice).
POLARITY_BREAK_SHARE = 0.05

# -- the sniffer's character format ----------------------------------------------------------------
#: Parity or framing errors per valid frame that show the sniffer's character format differs from
#: the bus's: the bytes (and CRCs) come through, the parity or stop bit does not (common practice:
#: noise that marks one frame in ten also breaks CRCs). Only ``line_error`` events count: a marked
#: byte a driver left behind its frame is an idle-line byte, which says nothing of the format.
FORMAT_LINE_ERRORS_PER_FRAME = 0.1
#: ... while no more than this share of frames fails its CRC (common practice).
FORMAT_MAX_DAMAGED_SHARE = 0.02

# -- damaged answers --------------------------------------------------------------------------------
#: Share of a station's answers damaged that is worth a notice (common practice: a healthy RS-485
#: segment shows practically no CRC failures; one in five hundred already means something).
ERROR_NOTICE_SHARE = 0.002
#: ... and a warning (common practice: one in a hundred costs retries and slows the poll cycle).
ERROR_WARNING_SHARE = 0.01
#: Stations that must show errors for them to be bus-wide rather than one drop's (common practice).
BUS_WIDE_STATION_SHARE = 2 / 3
#: Far stations' error share at least this many times the near stations' points at reflections
#: along the cable (common practice: noise picked up along the run affects every drop alike).
FAR_RATIO = 3.0
#: Floor for the near stations' share in that comparison, so zero errors near is not infinitely
#: better than one (common practice: below one in a thousand the counts are chance).
NEAR_FLOOR_SHARE = 0.001
#: One station's error share this many times the others' median: the trouble is at its drop.
CONCENTRATED_RATIO = 5.0
#: Segment length above which reflections and attenuation are expected, m (MSL §3.4.3: 1000 m at
#: up to 9600 bps with AWG26; TIA-422-B Annex A.1.1 gives 1200 m below 90 kbit/s).
MAX_SEGMENT_M = 1000.0
#: Longest stub (drop) the serial-line guide allows, m (MSL §3.4.3).
MAX_STUB_M = 20.0

# -- errors clustered in time -----------------------------------------------------------------------
#: A minute is a burst when it holds at least this many damage events ...
CLUSTER_MIN_EVENTS = 10
#: ... and this many times the capture's lower-quartile minute (plus one) (common practice).
CLUSTER_FACTOR = 5.0
#: Bursts must hold this share of all damage events for the errors to count as clustered ...
CLUSTER_SHARE = 0.6
#: ... and cover no more than this share of the minutes with traffic (common practice).
CLUSTER_MAX_MINUTE_SHARE = 0.5

# -- stray bytes at idle (fail-safe bias) -----------------------------------------------------------
#: Stray bytes between frames, as a share of frames, that point at a floating idle line
#: (common practice; MSL §3.4.6 and NSC AN-847 on why an idle line needs bias).
BIAS_STRAY_SHARE = 0.005
#: Stray bytes must outnumber damaged frames by this factor: the frames themselves are intact,
#: only the silences between them are not (common practice).
BIAS_STRAY_OVER_DAMAGE = 2.0

# -- a line nobody holds idle (idle-line bytes) ------------------------------------------------------
#: Idle-line bytes (one byte a driver leaves behind its frame as it lets go of a floating line) per
#: valid frame that show the line is not held idle. Without fail-safe bias every driver that
#: switches off leaves such a byte, so an unbiased line shows one behind nearly every frame
#: (FIELD-NOTES 21; MSL §3.4.6 and NSC AN-847 on why an idle line needs bias); a biased line
#: shows them only where noise happens to hit a silence. "Most frames" is the edge (common
#: practice: marginal bias that holds the line on some turnarounds and not on others still shows).
IDLE_BYTES_PER_FRAME = 0.5

# -- two stations on one address --------------------------------------------------------------------
#: Share of one station's answers damaged that looks like two talkers (common practice: noise or a
#: poor drop damages a few percent; two devices answering together damage most answers).
DUPLICATE_DAMAGED_SHARE = 0.3
#: The other stations' median damaged share must stay below this: the line itself is fine.
DUPLICATE_OTHERS_MAX = 0.05
#: Framing errors and breaks per damaged answer that show two drivers fighting (common practice:
#: overlapping drivers make most characters unreadable, noise only a few).
DUPLICATE_OVERLAP_PER_ANSWER = 0.5
#: Valid answers from one address that nobody waited for, as a share of its polls, that show a
#: second device answering after the first without overlapping it (common practice: a slow
#: device's late answers make a few percent).
DUPLICATE_ORPHAN_SHARE = 0.3

# -- timing violations ------------------------------------------------------------------------------
#: Share of a station's answers starting under t3.5 after the request before it is reported
#: (t3.5: MSL §2.5.1.1 p13; the share is common practice).
TURNAROUND_MIN_SHARE = 0.01
#: Share of a station's answers with a gap over t1.5 inside (MSL §2.5.1.1 p13) before it is
#: reported, and how far above the other stations' median it must be (common practice: the
#: timestamp model puts a small, even share of such events on every station).
GAP_MIN_SHARE = 0.05
GAP_OVER_OTHERS = 3.0
#: A median response time under this many t3.5 with timestamps too coarse to tell is reported as a
#: possible short turnaround (common practice: a device answering in 2 x t3.5 or more keeps t3.5
#: with room to spare; between 1 and 1.5 x t3.5 its faster answers may not).
TURNAROUND_SUSPECT_FACTOR = 1.5

# -- exceptions -------------------------------------------------------------------------------------
#: Share of requests answered with an exception that makes it a warning (common practice).
EXCEPTION_WARNING_SHARE = 0.01
#: Codes that report a fault of the device or gateway itself: a warning at any rate (MAP p48-49).
DEVICE_FAULT_CODES = (4, 8, 11)

# -- layout ---------------------------------------------------------------------------------------
#: Devices one RS-485 segment takes without a repeater (MSL §3.4.1; TI AN-1057) ...
MAX_DEVICES = 32
#: ... fewer when the line carries the Modbus bias resistors (MSL §3.4.6: the maximum drops by 4).
BIAS_DEVICE_COST = 4

# -- bus load ---------------------------------------------------------------------------------------
#: Line utilisation above which adding stations will stretch the cycle (common practice).
LOAD_NOTICE_UTILISATION = 0.7


@dataclass(frozen=True)
class Thresholds:
    """Every threshold the rules read; ``Thresholds()`` holds the documented defaults."""

    min_requests: int = MIN_REQUESTS
    min_events: int = MIN_EVENTS
    late_min_count: int = LATE_MIN_COUNT
    late_warning_share: float = LATE_WARNING_SHARE
    late_critical_share: float = LATE_CRITICAL_SHARE
    suggest_quantile: float = SUGGEST_QUANTILE
    timeout_margin: float = TIMEOUT_MARGIN
    timeout_steps_ms: tuple = TIMEOUT_STEPS_MS
    headroom_share: float = HEADROOM_SHARE
    silent_dark_share: float = SILENT_DARK_SHARE
    silent_edge_share: float = SILENT_EDGE_SHARE
    silent_critical_s: float = SILENT_CRITICAL_S
    unreadable_damage_share: float = UNREADABLE_DAMAGE_SHARE
    polarity_break_share: float = POLARITY_BREAK_SHARE
    format_line_errors_per_frame: float = FORMAT_LINE_ERRORS_PER_FRAME
    format_max_damaged_share: float = FORMAT_MAX_DAMAGED_SHARE
    error_notice_share: float = ERROR_NOTICE_SHARE
    error_warning_share: float = ERROR_WARNING_SHARE
    bus_wide_station_share: float = BUS_WIDE_STATION_SHARE
    far_ratio: float = FAR_RATIO
    near_floor_share: float = NEAR_FLOOR_SHARE
    concentrated_ratio: float = CONCENTRATED_RATIO
    max_segment_m: float = MAX_SEGMENT_M
    max_stub_m: float = MAX_STUB_M
    cluster_min_events: int = CLUSTER_MIN_EVENTS
    cluster_factor: float = CLUSTER_FACTOR
    cluster_share: float = CLUSTER_SHARE
    cluster_max_minute_share: float = CLUSTER_MAX_MINUTE_SHARE
    bias_stray_share: float = BIAS_STRAY_SHARE
    bias_stray_over_damage: float = BIAS_STRAY_OVER_DAMAGE
    idle_bytes_per_frame: float = IDLE_BYTES_PER_FRAME
    duplicate_damaged_share: float = DUPLICATE_DAMAGED_SHARE
    duplicate_others_max: float = DUPLICATE_OTHERS_MAX
    duplicate_overlap_per_answer: float = DUPLICATE_OVERLAP_PER_ANSWER
    duplicate_orphan_share: float = DUPLICATE_ORPHAN_SHARE
    turnaround_min_share: float = TURNAROUND_MIN_SHARE
    gap_min_share: float = GAP_MIN_SHARE
    gap_over_others: float = GAP_OVER_OTHERS
    turnaround_suspect_factor: float = TURNAROUND_SUSPECT_FACTOR
    exception_warning_share: float = EXCEPTION_WARNING_SHARE
    device_fault_codes: tuple = DEVICE_FAULT_CODES
    load_notice_utilisation: float = LOAD_NOTICE_UTILISATION
    max_devices: int = MAX_DEVICES
    bias_device_cost: int = BIAS_DEVICE_COST
