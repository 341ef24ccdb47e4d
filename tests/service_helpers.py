"""Helpers shared by the engine, service and crash tests: store dumps and exact comparison."""

from __future__ import annotations

import json
import os
import socket
import sqlite3
import struct
import time

import numpy as np
import pandas as pd

#: what "the same store" means: every table that holds results, in an order independent of
#: how rows were grouped into batches (ids and wall-clock columns left out)
DUMP_QUERIES = {
    "observations": "SELECT series, ts, price, quantity, controls, source, source_row, "
                    "exposure FROM observations ORDER BY series, ts",
    "estimates": "SELECT * FROM estimates ORDER BY series, ts",
    "latest_estimates": "SELECT * FROM latest_estimates ORDER BY series",
    "series": "SELECT series, first_ts, last_ts, n_obs, n_estimates FROM series ORDER BY series",
    "checkpoints": "SELECT series, state, last_ts, last_pos FROM checkpoints ORDER BY series",
    "rejects": "SELECT source, row, series, ts, field, value, raw, reason FROM rejects "
               "ORDER BY source, row",
    "alerts": "SELECT series, kind, severity, state, opened_ts, resolved_ts, beta, beta_lo, "
              "beta_hi, message, details FROM alerts ORDER BY series, kind, opened_ts",
    "alert_events": "SELECT a.series, a.kind, a.opened_ts, e.event, e.ts, e.who, e.note "
                    "FROM alert_events e JOIN alerts a ON a.id = e.alert_id "
                    "ORDER BY a.series, a.kind, a.opened_ts, e.id",
    "outbox": "SELECT o.event, o.sink, a.series, a.kind, a.opened_ts FROM outbox o "
              "JOIN alerts a ON a.id = o.alert_id ORDER BY a.series, a.kind, a.opened_ts, o.id",
    "source_offsets": "SELECT source, kind, position, rows_read, rows_rejected FROM "
                      "source_offsets ORDER BY source",
}


def dump(path, skip=()) -> dict[str, list[tuple]]:
    """Every result table of a store as a list of rows (floats kept as Python floats)."""
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        return {name: conn.execute(sql).fetchall() for name, sql in DUMP_QUERIES.items()
                if name not in skip}
    finally:
        conn.close()


def _bits(v):
    """A value with floats replaced by their IEEE-754 bit pattern (exact comparison)."""
    if isinstance(v, float):
        return ("f64", struct.pack("<d", v))
    return v


def assert_same_store(a, b, skip=()) -> None:
    """Two stores hold the same rows in every result table, floats equal to the bit."""
    da, db = dump(a, skip), dump(b, skip)
    for name in da:
        ra = [tuple(_bits(v) for v in row) for row in da[name]]
        rb = [tuple(_bits(v) for v in row) for row in db[name]]
        assert len(ra) == len(rb), f"{name}: {len(ra)} rows against {len(rb)}"
        for i, (x, y) in enumerate(zip(ra, rb)):
            assert x == y, f"{name} row {i} differs:\n  {da[name][i]}\n  {db[name][i]}"


def frame(path, sql: str) -> pd.DataFrame:
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        return pd.read_sql_query(sql, conn)
    finally:
        conn.close()


def csv_bytes(log: pd.DataFrame) -> bytes:
    """A log as CSV bytes, one row a line, floats in their shortest round-trip form."""
    return log.to_csv(index=False, lineterminator="\n", float_format=None).encode("utf-8")


def states(path) -> dict[str, dict]:
    return {s: json.loads(st) for s, st, *_ in dump(path)["checkpoints"]}


def equal_bits(a: np.ndarray, b: np.ndarray) -> bool:
    return np.asarray(a, dtype=np.float64).tobytes() == np.asarray(b, dtype=np.float64).tobytes()


#: the least time a wait polls before it gives up (seconds; ELMON_TEST_HANG_GUARD_S)
HANG_GUARD_S = float(os.environ.get("ELMON_TEST_HANG_GUARD_S", "600"))


def wait_until(predicate, timeout: float, step: float = 0.05) -> bool:
    """Poll ``predicate`` until true or the hang guard passes (callers assert on the state
    polled). ``timeout`` is what the caller expects at most on an idle machine; the guard is
    never below :data:`HANG_GUARD_S` seconds, because on a loaded machine with a cold numba
    cache a service's first batch compiles for minutes (CI failed at 60 s). A true predicate
    returns at once, so the guard costs nothing when the code works."""
    end = time.monotonic() + max(timeout, HANG_GUARD_S)
    while time.monotonic() < end:
        if predicate():
            return True
        time.sleep(step)
    return bool(predicate())


class Inbox:
    """An aiosmtpd handler that keeps every envelope it is sent (tests of the e-mail sink)."""

    def __init__(self):
        self.envelopes = []

    async def handle_DATA(self, server, session, envelope):
        self.envelopes.append(envelope)
        return "250 OK"


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on right now."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]
