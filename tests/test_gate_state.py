"""The validation gate's checkpoint form (monitor/rows/gate_state.py, issue 15: checkpoint
state in a compact binary form).

Every bit of a series' gate survives the text (NaN payloads, signed zeros, the int64 minimum
that marks "no time yet"); the older JSON object form is read to the same values; a reset
reads the last time from either form; a text of the wrong size is refused; and the binary
text is shorter than the JSON object it replaces.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from monitor.rows.gate_state import (GATE_PREFIX, NO_TIME, gate_bytes, gate_parts, gate_text,
                                     last_time)
from monitor.rows.validate import WINDOW, SeriesGate
from monitor.store.live import fresh_state


def _gate(rng) -> SeriesGate:
    g = SeriesGate()
    g.ids(np.array(["a", "b", "c"], dtype=object))
    g.last_ts[:] = [1_714_557_600_123_456_789, NO_TIME, -5]
    g.ring[:] = rng.normal(0.0, 1.0, (3, WINDOW))
    g.ring[0, 3] = -0.0
    g.ring[1, 4] = np.frombuffer(np.uint64(0x7FF8_0000_0000_0ABC).tobytes(), "<f8")[0]  # NaN payload
    g.ring_ts[:] = rng.integers(-2**62, 2**62, (3, WINDOW))
    g.count[:] = [40, 0, 7]
    g.qring[:] = rng.normal(2.0, 1.0, (3, WINDOW))
    g.qcount[:] = [15, 0, 3]
    return g


def test_binary_gate_text_keeps_every_bit():
    g = _gate(np.random.default_rng(3))
    for i in range(3):
        text = gate_text(g, i)
        assert text.startswith(GATE_PREFIX)
        last, ring, ring_ts, count, qring, qcount = gate_parts(text, WINDOW)
        assert last == g.last_ts[i] and count == g.count[i] and qcount == g.qcount[i]
        assert ring.tobytes() == g.ring[i].tobytes()          # bit for bit, NaN payload too
        assert ring_ts.tobytes() == g.ring_ts[i].tobytes()
        assert qring.tobytes() == g.qring[i].tobytes()
    assert np.signbit(gate_parts(gate_text(g, 0), WINDOW)[1][3])


def test_older_json_object_reads_to_the_same_values_and_is_longer():
    g = _gate(np.random.default_rng(4))
    obj = g.state_of("c")                                      # the form before
    text = gate_text(g, 2)
    for a, b in zip(gate_parts(obj, WINDOW), gate_parts(json.loads(json.dumps(obj)), WINDOW)):
        assert np.array_equal(a, b)
    for a, b in zip(gate_parts(obj, WINDOW), gate_parts(text, WINDOW)):
        assert np.array_equal(a, b)
    assert gate_bytes(obj, WINDOW) is None
    assert len(text) < len(json.dumps(obj)) / 1.5


def test_a_reset_keeps_the_last_time_of_either_form():
    g = _gate(np.random.default_rng(5))
    for i, name in enumerate(["a", "b", "c"]):
        want = None if g.last_ts[i] == NO_TIME else int(g.last_ts[i])
        for form in (gate_text(g, i), g.state_of(name)):
            assert last_time(form) == want
            st = fresh_state({"gate": form, "last_obs_ns": 9, "zero_skipped": 2})
            assert st["gate"] == {"last_ts": want, "count": 0} and st["pipeline"] is None
    assert fresh_state({"gate": None})["gate"] is None


def test_a_gate_text_of_another_size_or_not_base64_is_refused():
    g = _gate(np.random.default_rng(6))
    text = gate_text(g, 0)
    with pytest.raises(ValueError, match="bytes"):
        gate_parts(text[:-8], WINDOW)                          # 6 bytes short
    with pytest.raises(ValueError):
        gate_parts(GATE_PREFIX + "not base64 !", WINDOW)
    with pytest.raises(ValueError, match="neither"):
        gate_parts([1, 2, 3], WINDOW)
