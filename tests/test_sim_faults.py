"""Each built-in single-fault scenario shows its fault on the wire, and only there.

Outside check values carry their source inline (source: the MAP/MSL specifications,
TIMING.md or termios(3), as cited beside each).
"""

import dataclasses

import buswitness.simulate.run as run_module
import pytest
from buswitness.decode.timing import t15_s, t35_s
from buswitness.simulate import START_MONOTONIC_NS, load_scenario, simulate
from buswitness.simulate.fastpath import is_plain

S = 1_000_000_000


def truth_of(name, duration_s=120, seed=1):
    return simulate(load_scenario(name), duration_s=duration_s, seed=seed).truth


def test_late_station_answers_after_the_timeout_and_its_answer_hits_the_next_request():
    tr = truth_of("fault-late", 300)
    tx = tr.transactions
    late = tx[tx.outcome == "late"]
    assert len(late) > 5 and (late.station == 7).all()
    assert (late.response_ms > 200).all()
    # a late answer still on the line damages what the master sends next: that request gets no answer
    hit = tx[tx.request_corrupted]
    assert len(hit) > 0 and (hit.outcome == "timeout").all()
    assert tr.stations[7]["retries"] > 0


def test_silent_station_times_out_only_during_its_silence():
    tx = truth_of("fault-silent", 300).transactions
    mine = tx[tx.station == 2]
    t = (mine.t_request_start_ns - START_MONOTONIC_NS) / S
    inside = (t >= 90) & (t < 210)
    assert (mine[inside].outcome == "timeout").all()
    assert (mine[~inside].outcome == "ok").all()


def test_absent_station_never_answers_and_no_answers_at_all_keeps_the_master_polling():
    tr = truth_of("fault-absent")
    assert tr.stations[4]["answered"] == 0 and tr.stations[4]["timeouts"] == tr.stations[4]["requests"] > 0
    f = tr.frames
    assert not ((f.kind == "response") & (f.station == 4)).any()
    tr = truth_of("fault-no-answers")
    assert (tr.frames.talker == "master").all()
    assert (tr.transactions.outcome == "timeout").all()
    assert tr.transactions.retry.any()


def test_duplicate_address_answers_overlap_and_corrupt():
    tr = truth_of("fault-duplicate")
    f = tr.frames
    both = f[(f.kind == "response") & (f.station == 3)]
    assert both.collided.mean() > 0.3
    assert tr.stations[3]["corrupt"] > 0 and tr.stations[3]["crc_errors"] > 0
    assert not f[(f.kind == "response") & (f.station != 3)].collided.any()


def test_far_station_gets_more_bit_errors_than_the_near_one():
    f = truth_of("fault-noise-far", 300).frames
    near = f[f.station == 1].noisy.mean()
    far = f[f.station == 3].noisy.mean()
    assert far > 10 * max(near, 1e-4)


def test_noise_burst_damages_frames_inside_it_and_leaves_stray_bytes():
    tr = truth_of("fault-burst", 200)
    f = tr.frames
    t = (f.t_first_bit_ns - START_MONOTONIC_NS) / S
    in_burst = ((t >= 60) & (t < 63)) | ((t >= 180) & (t < 183))
    assert f[in_burst].noisy.mean() > 0.5
    assert not f[~in_burst].noisy.any()
    assert tr.bus["stray_bytes"] > 0
    assert (tr.events.kind == "noise_burst").sum() == 2


def test_fast_turnaround_is_under_t35_and_still_answered():
    sc = load_scenario("fault-fast-turnaround")
    tx = simulate(sc, duration_s=30).truth.transactions
    fast = tx[tx.station == 1]
    assert (fast.outcome == "ok").all()
    assert (fast.response_ms < t35_s(sc.serial) * 1e3).all()   # t3.5: MSL V1.02 section 2.5.1.1 p13


def test_gap_inside_a_frame_is_longer_than_t15():
    sc = load_scenario("fault-gap")
    f = simulate(sc, duration_s=30).truth.frames
    gapped = f[f.gap_after_byte >= 0]
    assert len(gapped) > 0 and (gapped.station == 2).all()
    c = sc.serial.char_time_s * 1e9
    silence = (gapped.t_last_bit_ns - gapped.t_first_bit_ns) - gapped.raw.str.len() * c
    assert (silence > t15_s(sc.serial) * 1e9).all()              # t1.5: MSL V1.02 section 2.5.1.1 p13
    assert (gapped.received == gapped.raw).all()


def test_exception_station_answers_with_its_codes():
    tr = truth_of("fault-exceptions", 60)
    tx = tr.transactions
    exc = tx[tx.outcome == "exception"]
    assert set(exc.station) == {2}
    assert set(exc.exception_code) <= {2, 3}
    assert all(r[1] == 0x83 for r in exc.response_raw)           # FC + 0x80: MAP V1.1b3 p47
    assert tr.stations[2]["exceptions"]["total"] == len(exc)


@pytest.mark.parametrize("name", ["clean", "saturated115200"])
def test_fault_free_buses_have_no_fault_events_and_no_damage(name):
    tr = truth_of(name, 30)
    assert tr.events.empty
    assert not tr.frames.corrupted.any()
    assert set(tr.transactions.outcome) <= {"ok", "broadcast"}


def test_whole_cycle_schedule_matches_the_per_transaction_loop(monkeypatch):
    sc = load_scenario("clean")
    # without the broadcast both draw one number per transaction from the same stream
    sc = dataclasses.replace(sc, master=dataclasses.replace(sc.master, polls=sc.master.polls[:3]))
    assert is_plain(sc)
    fast = simulate(sc, duration_s=30, seed=2).truth.transactions
    monkeypatch.setattr(run_module, "is_plain", lambda scenario: False)
    loop = simulate(sc, duration_s=30, seed=2).truth.transactions
    assert len(fast) == len(loop) > 300
    assert fast.t_request_start_ns.tolist() == loop.t_request_start_ns.tolist()
    assert fast.t_response_start_ns.tolist() == loop.t_response_start_ns.tolist()
    assert [r[:3] for r in fast.response_raw] == [r[:3] for r in loop.response_raw]


@pytest.mark.parametrize("name", ["fault-late", "fault-duplicate", "noisy"])
def test_faulty_scenarios_use_the_per_transaction_loop(name):
    assert not is_plain(load_scenario(name))
