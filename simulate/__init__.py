"""Simulate: a Modbus RTU bus with faults, written as captures together with their ground truth.

    from buswitness.simulate import load_scenario, simulate
    res = simulate(load_scenario("pumpstation"), duration_s=600, seed=1)
    for batch in res.batches(): ...      # the records `record` would have written
    res.truth.transactions              # what really happened
"""

from buswitness.simulate.run import START_MONOTONIC_NS, SimResult, simulate
from buswitness.simulate.scenario import Scenario, builtin_descriptions, builtin_names, load_scenario
from buswitness.simulate.truth import Truth, read_truth

__all__ = ["START_MONOTONIC_NS", "Scenario", "SimResult", "Truth", "builtin_descriptions", "builtin_names",
           "load_scenario", "read_truth", "simulate"]
