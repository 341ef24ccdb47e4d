"""The validation gate's per-series state as checkpoint text: a compact binary form.

The gate (:class:`monitor.rows.validate.SeriesGate`) keeps, per series, the last accepted
time, the recent accepted prices and their times, and the recent log quantities (``WINDOW``
each) with their counts. A checkpoint stores them with the series' pipeline state.

Form: ``"g8:"`` followed by the base64 text of one little-endian record of
``3 + 3 * WINDOW`` eight-byte values, in this order::

    last_ts (int64, ns UTC), count (int64), qcount (int64),
    ring (WINDOW x float64), ring_ts (WINDOW x int64), qring (WINDOW x float64)

Every bit is kept (NaN payloads, signed zeros, the int64 minimum that marks "no time yet").
The record is 384 bytes (512 characters of text) for ``WINDOW = 15``, against about 1,000
characters as a JSON object of lists (the form before), and it is encoded and decoded without
formatting or parsing a number: the one-row live path saved about 7% of its CPU time on the JSON
encoder, and a restart decodes every series' record in one ``np.frombuffer`` (the JSON lists took
about 2.5 of 6 CPU-seconds of a 100,000-series restart: benchmarks/RESULTS.md, group
``restart``). The JSON object form of older checkpoints is still read (:func:`gate_parts`).
"""

from __future__ import annotations

import base64

import numpy as np

#: prefix of the binary form of a gate state in a checkpoint
GATE_PREFIX = "g8:"
#: "no time yet" (the gate's value before a series' first accepted row)
NO_TIME = int(np.iinfo(np.int64).min)


def record_dtype(window: int) -> np.dtype:
    """The record's numpy dtype for a ring of ``window`` values (little-endian, packed)."""
    return np.dtype([("last_ts", "<i8"), ("count", "<i8"), ("qcount", "<i8"),
                     ("ring", "<f8", (window,)), ("ring_ts", "<i8", (window,)),
                     ("qring", "<f8", (window,))])


def gate_text(gate, i: int) -> str:
    """Series ``i`` of ``gate`` (a :class:`~monitor.rows.validate.SeriesGate`) as checkpoint
    text in the binary form (module docstring)."""
    window = gate.ring.shape[1]
    rec = np.zeros(1, dtype=record_dtype(window))
    rec["last_ts"] = gate.last_ts[i]
    rec["count"] = gate.count[i]
    rec["qcount"] = gate.qcount[i]
    rec["ring"][0] = gate.ring[i]
    rec["ring_ts"][0] = gate.ring_ts[i]
    rec["qring"][0] = gate.qring[i]
    return GATE_PREFIX + base64.b64encode(rec.tobytes()).decode("ascii")


def gate_bytes(obj, window: int) -> bytes | None:
    """The raw record of a binary gate text of the right size, else ``None`` (a JSON object of
    an older checkpoint, read by :func:`gate_parts`). Raises ``ValueError`` for a binary text
    that is not base64 or has another length."""
    if not (isinstance(obj, str) and obj.startswith(GATE_PREFIX)):
        return None
    raw = base64.b64decode(obj[len(GATE_PREFIX):].encode("ascii"), validate=True)
    size = record_dtype(window).itemsize
    if len(raw) != size:
        raise ValueError(f"gate state holds {len(raw)} bytes; a ring of {window} needs {size}")
    return raw


def gate_parts(obj, window: int) -> tuple:
    """``(last_ts, ring, ring_ts, count, qring, qcount)`` of one series from a checkpoint's
    gate state: the binary text, or the JSON object of older checkpoints
    (``SeriesGate.state_of`` then; a dict without rings, as a reset writes, or without
    ``qring``, as versions before the quantity check wrote, starts them at zero)."""
    raw = gate_bytes(obj, window)
    if raw is not None:
        rec = np.frombuffer(raw, dtype=record_dtype(window))[0]
        return (int(rec["last_ts"]), rec["ring"].astype(np.float64),
                rec["ring_ts"].astype(np.int64), int(rec["count"]),
                rec["qring"].astype(np.float64), int(rec["qcount"]))
    if not isinstance(obj, dict):
        raise ValueError(f"gate state is neither {GATE_PREFIX!r} text nor an object")
    last = obj.get("last_ts")
    zeros = np.zeros(window)
    return (NO_TIME if last is None else int(last),
            np.asarray(obj.get("ring", zeros), dtype=np.float64),
            np.asarray(obj.get("ring_ts", zeros), dtype=np.int64), int(obj["count"]),
            np.asarray(obj.get("qring", zeros), dtype=np.float64),
            int(obj.get("qcount", 0)))


def last_time(obj) -> int | None:
    """The gate's last accepted time (ns) in either form, ``None`` when it has none."""
    if isinstance(obj, str) and obj.startswith(GATE_PREFIX):
        raw = base64.b64decode(obj[len(GATE_PREFIX):].encode("ascii"), validate=True)
        last = int(np.frombuffer(raw[:8], dtype="<i8")[0])
        return None if last == NO_TIME else last
    if isinstance(obj, dict):
        last = obj.get("last_ts")
        return None if last is None or int(last) == NO_TIME else int(last)
    return None
