"""Per-trace random generators of the simulator: keyed by seed, settings, pose and repeat."""

from __future__ import annotations

import numpy as np

from bench.sim.receiver import ReceiverSettings
from bench.sim.state import SimState
from bench.sim.tracerng import TraceRng, pose_fields, settings_fields, trace_digest_words

FIELDS = (30e6, 1e9, 1001, 120e3, 120e3, "POS", 10.0, 0.168,
          0.0, 0.0, 0.05, 0.0, 0, 1.0, "horizontal", 0.0, True)


def test_digest_is_stable_across_runs_and_platforms():
    # SHA-256 of the canonical text, not Python's salted hash(): a fixed value
    assert trace_digest_words(FIELDS) == [2493344008, 3439155760, 3852162326, 1050138989]


def test_negative_zero_and_last_bits_of_a_move_do_not_change_the_key():
    assert trace_digest_words(FIELDS[:8] + (-0.0,) + FIELDS[9:]) == trace_digest_words(FIELDS)
    state, moved = SimState(), SimState()
    moved.probe_m = [0.1 + 0.2 - 0.3, 0.0, 0.05]  # 5.6e-17 m off zero
    assert pose_fields(moved) == pose_fields(state)


def test_settings_fields_resolve_vbw_and_sweep_time():
    fields = settings_fields(ReceiverSettings(30e6, 1e9, 1001, 120e3))
    assert fields[4] == 120e3 and abs(fields[7] - 2.5 * 970e6 / 120e3**2) < 1e-12


def test_repeat_number_counts_from_the_last_key_change():
    settings, other = ReceiverSettings(30e6, 1e9, 101, 120e3), ReceiverSettings(30e6, 2e9, 101, 120e3)
    pose = pose_fields(SimState())

    def draws(rng: TraceRng, s: ReceiverSettings) -> float:
        return float(rng.generator(s, pose).standard_normal())

    a = TraceRng(7)
    first, second = draws(a, settings), draws(a, settings)
    draws(a, other)
    assert (draws(a, settings), draws(a, settings)) == (first, second) and first != second
    assert draws(TraceRng(8), settings) != first  # the seed enters the key
    b = TraceRng(7)
    assert draws(b, settings) == first
    assert isinstance(b.generator(settings, pose), np.random.Generator) and b.repeat == 1
