"""Restart restores every series in one bulk pass (issue 14: 100k series took 188 s when the
gate's arrays grew one series at a time; ``make bench`` group ``restart`` times it now).

A monitor over 40 series (one of them only zero-quantity rows, so it has no gate state; half
of the checkpoints rewritten in the older JSON-list form of the state vector, a third of them
with the older JSON-object form of the validation gate's state) is closed and
opened again: the restored state matrix, gate arrays and per-series counts equal what the
closing monitor held, bit for bit, and the restarted monitor then writes exactly the
estimates of one that never stopped. A series reset by ``elmon series reset`` comes back as a
new series' state.
"""

from __future__ import annotations

import json
import sqlite3

import numpy as np
import pandas as pd

from monitor.estimators.rls import floats_to_json
from monitor.live.checkpoints import vector_from_json
from monitor.live.monitor import Monitor
from monitor.rows.gate_state import GATE_PREFIX, gate_parts
from monitor.rows.validate import WINDOW
from monitor.settings import validate
from monitor.store.live import reset_series

GATE = ("last_ts", "ring", "ring_ts", "count", "qring", "qcount")
NAMES = [f"depot{i % 4}/item{i:03d}" for i in range(39)] + ["depot9/zeros"]


def _config():
    return validate({"validation": {"zero_policy": "skip"}})


def _frame(hours: range, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    parts = []
    for h in hours:
        p = np.round(4.0 * np.exp(rng.normal(0, 0.15, len(NAMES))), 2)
        q = np.round(np.exp(3.0 - 1.5 * np.log(p) + rng.normal(0, 0.2, len(NAMES))), 3)
        q[-1] = 0.0                                    # the last series sells nothing
        parts.append(pd.DataFrame({"series": NAMES, "ts": f"2024-03-{1 + h // 24:02d}T"
                                   f"{h % 24:02d}:00:00Z", "price": p, "quantity": q}))
    return pd.concat(parts, ignore_index=True)


def _memory(mon) -> dict:
    """Everything the monitor holds per series, by name (state bytes, gate values, counts)."""
    book, gate = mon.book, mon.gate
    return {"states": {s: book.states[i].tobytes() for s, i in book.index.items()},
            "gate": {s: tuple(getattr(gate, k)[i].tobytes() for k in GATE)
                     for s, i in gate.index.items()},
            "counts": (book.updates, book.last_status, book.last_obs, book.zero,
                       book.rows_read)}


def _old_form(db, every: int = 2, gate_every: int = 3) -> None:
    """Every ``every``-th checkpoint's state vector rewritten as the older JSON list, and every
    ``gate_every``-th gate state as the older JSON object (``SeriesGate.state_of``'s dict)."""
    with sqlite3.connect(db) as con:
        rows = con.execute("SELECT series, state FROM checkpoints ORDER BY series").fetchall()
        for k, (series, text) in enumerate(rows):
            st = json.loads(text)
            if k % every == 0:
                st["pipeline"] = floats_to_json(vector_from_json(None, st["pipeline"]))
            if k % gate_every == 0 and st.get("gate") is not None:
                assert st["gate"].startswith(GATE_PREFIX)      # written in the binary form
                last, ring, ring_ts, count, qring, qcount = gate_parts(st["gate"], WINDOW)
                st["gate"] = {"last_ts": last, "ring": ring.tolist(),
                              "ring_ts": ring_ts.tolist(), "count": count,
                              "qring": qring.tolist(), "qcount": qcount}
            con.execute("UPDATE checkpoints SET state = ? WHERE series = ?",
                        (json.dumps(st), series))


def _estimates(db):
    with sqlite3.connect(db) as con:
        return con.execute("SELECT series, ts, beta, beta_se, beta_lo, beta_hi, n_eff, status "
                           "FROM estimates ORDER BY series, ts").fetchall()


def test_restart_restores_every_series_bit_for_bit_and_resumes_exactly(tmp_path):
    first, second = _frame(range(30), 5), _frame(range(30, 45), 6)
    db, whole = tmp_path / "r.sqlite", tmp_path / "whole.sqlite"
    with Monitor(db, _config()) as mon:
        for k in range(3):                          # three batches of ten hours
            mon.observe_many(first.iloc[k * 400:(k + 1) * 400])
        before = _memory(mon)
    assert "depot9/zeros" in before["states"] and "depot9/zeros" not in before["gate"]
    _old_form(db)
    with Monitor(db, _config()) as mon:
        after = _memory(mon)
        assert after == before
        mon.observe_many(second)
    with Monitor(whole, _config()) as mon:
        for k in range(3):
            mon.observe_many(first.iloc[k * 400:(k + 1) * 400])
        mon.observe_many(second)
    got, ref = _estimates(db), _estimates(whole)
    assert len(got) == 39 * 45 and got == ref


def test_a_reset_series_is_restored_as_a_new_series(tmp_path):
    db = tmp_path / "r.sqlite"
    with Monitor(db, _config()) as mon:
        mon.observe_many(_frame(range(12), 7))
        fresh = mon.pipeline.new_states(1)[0].tobytes()
        other = mon.state_of(NAMES[1]).tobytes()
        last_ts = int(mon.gate.last_ts[mon.gate.index[NAMES[0]]])
        assert mon.state_of(NAMES[0]).tobytes() != fresh
    from monitor.store import Store

    with Store.open(db) as st:
        reset_series(st, NAMES[0], "tester", "units changed")
    with Monitor(db, _config()) as mon:
        assert mon.state_of(NAMES[0]).tobytes() == fresh
        assert mon.state_of(NAMES[1]).tobytes() == other
        g = mon.gate.index[NAMES[0]]
        assert mon.gate.last_ts[g] == last_ts and mon.gate.count[g] == 0
        assert not mon.gate.ring[g].any() and mon.book.updates[NAMES[0]] == 0
