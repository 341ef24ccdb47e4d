"""Restart: the wall time of opening a store of 100k series in a new process (issue 14).

A store is built once (:func:`build`): a tenth of the series get two hourly observations
through :meth:`monitor.live.monitor.Monitor.observe_many` (the service's batch path), so each
has a checkpoint (state vector, validation gate, counts); their checkpoint rows are copied
under new names up to 100k. The in-memory state of the monitor that wrote them (the state
matrix and the gate's arrays, repeated for the copies) is saved beside the store.

Each run then starts a fresh interpreter (``python -m benchmarks.restart --child STORE``)
that imports elmon and times ``Monitor(store)`` alone: open, migrations check, writer lock and
the restore of every checkpoint (:func:`monitor.live.checkpoints.restore`). The figure is the
wall time of that call (target: under 10 s, issue 14); the child also reports its CPU time
and compares, bit for bit, the restored state matrix and gate arrays with what the writing
monitor held (the check column). Before the bulk restore the same restart took 188 s
(4 December 2026, this machine: the gate's arrays were grown one series at a time).
"""

from __future__ import annotations

import json
import subprocess
import sys
import time

from benchmarks.common import ROOT, Context, Row, median

GATE_FIELDS = ("last_ts", "ring", "ring_ts", "count", "qring", "qcount")


def build(path, n: int, copies: int = 10) -> None:
    """A store of ``n`` series and ``<path>.npz``: the state matrix, series names and gate
    arrays the store's checkpoints hold. ``n // copies`` series get two hourly observations
    each through the service's batch path (two batches of one row per series); their
    checkpoint rows are then copied under new names (``NAME~k``) up to ``n`` series, so the
    restart reads ``n`` real checkpoints while the build stays a minute even on a loaded
    machine (feeding all 100k series took 135-590 s)."""
    import sqlite3

    import numpy as np
    import pandas as pd

    from monitor.live.monitor import Monitor

    base = n // copies
    rng = np.random.default_rng(14)
    names = np.array([f"depot{i % 40:02d}/item{i:07d}" for i in range(base)], dtype=object)
    with Monitor(path) as mon:
        for hour in range(2):
            p = np.exp(np.log(5.0) + rng.normal(0, 0.1, base))
            q = np.exp(3.0 - 1.8 * np.log(p) + rng.normal(0, 0.2, base))
            ts = f"2024-01-01T{hour:02d}:00:00Z"
            rep = mon.observe_many(pd.DataFrame({"series": names, "ts": ts, "price": p,
                                                 "quantity": q}), source="bench")
            if rep.accepted != base:
                raise RuntimeError(f"restart store: {rep.accepted} of {base} rows accepted")
        order = sorted(mon.book.index)
        states = mon.book.states[[mon.book.index[s] for s in order]]
        g = np.array([mon.gate.index[s] for s in order])
        gate = {k: getattr(mon.gate, k)[g] for k in GATE_FIELDS}
    with sqlite3.connect(path) as con:
        for k in range(1, copies):
            con.execute("INSERT INTO checkpoints (series, state, last_ts, last_pos, updated_at) "
                        "SELECT series || ?, state, last_ts, last_pos, updated_at FROM "
                        "checkpoints WHERE instr(series, '~') = 0", (f"~{k}",))
    all_names = order + [f"{s}~{k}" for k in range(1, copies) for s in order]
    np.savez(f"{path}.npz", names=np.array(all_names, dtype=str),
             states=np.concatenate([states] * copies),
             **{f"gate_{k}": np.concatenate([v] * copies) for k, v in gate.items()})


def child(path: str) -> dict:
    """Time ``Monitor(path)`` in this fresh process and compare its state with the saved."""
    import numpy as np

    from monitor.live.monitor import Monitor

    t0, c0 = time.perf_counter(), time.process_time()
    mon = Monitor(path)
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    try:
        saved = np.load(f"{path}.npz")
        names = list(saved["names"])
        same = [len(names) == len(mon.book.names)]
        rows = np.array([mon.book.index[s] for s in names])
        same.append(mon.book.states[rows].tobytes() == saved["states"].tobytes())
        g = np.array([mon.gate.index[s] for s in names])
        same += [getattr(mon.gate, k)[g].tobytes() == saved[f"gate_{k}"].tobytes()
                 for k in GATE_FIELDS]
    finally:
        mon.close()
    return {"wall": wall, "cpu": cpu, "series": len(names), "equal": all(same)}


def run(ctx: Context) -> list[Row]:
    n = ctx.size(100_000, 10_000)
    path = ctx.tmp / "restart.sqlite"
    t0 = time.perf_counter()
    build(path, n)
    built = time.perf_counter() - t0
    got = []
    for _ in range(max(1, min(ctx.runs, 3))):
        proc = subprocess.run([sys.executable, "-m", "benchmarks.restart", "--child", str(path)],
                              cwd=ROOT, capture_output=True, text=True, timeout=900)
        if proc.returncode != 0:
            raise RuntimeError(f"restart child failed: {proc.stderr.strip()[-500:]}")
        got.append(json.loads(proc.stdout.strip().splitlines()[-1]))
    walls = [g["wall"] for g in got]
    value = median(walls)
    equal = all(g["equal"] for g in got)
    size_mb = path.stat().st_size / 1e6
    return [Row(f"restart with {n:,} series: Monitor(store) in a new process (open, lock, "
                f"restore every checkpoint)", value, "s", walls, target="< 10 s",
                met=value < 10.0 and equal, better="lower",
                check=(f"restored state matrix and gate arrays {'equal' if equal else 'NOT equal'}"
                       f" to the writing monitor's, bit for bit; CPU "
                       f"{median([g['cpu'] for g in got]):.1f} s; store {size_mb:,.0f} MB, "
                       f"built in {built:.0f} s (2 rows per series "
                       f"for a tenth of them, their checkpoints copied for the rest)"))]


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "--child":
        print(json.dumps(child(sys.argv[2])))
    else:
        sys.exit("usage: python -m benchmarks.restart --child STORE")
