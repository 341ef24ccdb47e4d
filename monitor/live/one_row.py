"""The one-observation path of :meth:`monitor.live.monitor.Monitor.observe`, without data frames.

A call whose values are plainly valid (a known series, a newer timestamp in a strict ISO 8601
or epoch-seconds form, numbers inside ``[validation] min_value .. max_value``, every configured
control) is validated, run
through the pipeline and committed here in well under a millisecond of Python; anything else
(a new series, a value to reject, a zero quantity under the log-log model, an unusual
timestamp form) returns :data:`NOT_PLAIN` and goes through the general batch path, which judges
and words it. Both paths call the same validation kernel, design matrix, pipeline and SQL
statements, so the store ends the same either way (tests/test_engine.py compares every table).

The Poisson model (``[estimator] model = "poisson"``, issue 13) takes this path too, as the
batch path runs it (:func:`monitor.rows.prepare.response`, :func:`~monitor.rows.prepare.offset_of`):
the response is ``q`` itself, a zero quantity included (zero policy ``keep``: it is data, and
the quantity check skips it as the kernel does for ``log 0``), and the exposure column
(``[estimator] exposure``) must be a number inside ``min_value .. max_value`` (anything else
goes to the batch path, which rejects it) and enters as the offset ``log(exposure)``; the
value itself is stored in ``observations.exposure`` as the batch path stores it.
tests/test_engine_poisson.py holds the store equal to the batch path's and the estimates equal
to the replay's.
"""

from __future__ import annotations

import math
import re
from numbers import Real

import numpy as np
import pandas as pd

from monitor.estimators import kernel as K
from monitor.estimators.transform import design_matrix
from monitor.live.batch import NAT, alert_changes
from monitor.rows.gate_state import gate_text
from monitor.rows.validate import TS_MAX_NS, TS_MIN_NS, log_qratio, ordered_checks
from monitor.store import to_json, wall_ts
from monitor.store.live import write_one
from monitor.types import STATUS_LABELS, Estimate


NOT_PLAIN = object()
_ISO = re.compile(r"^(\d{4})-\d\d-\d\dT\d\d:\d\d:\d\d(\.\d{1,9})?(Z|[+-]\d\d:\d\d)?$")


def iso_z(ns: int) -> str:
    """:func:`monitor.rows.isotime.format_ts` of one time: ISO 8601 UTC, ``Z``, microseconds only
    when the time is not a whole second.

    >>> iso_z(1714557600_000000000), iso_z(1714557600_250000000)
    ('2024-05-01T10:00:00Z', '2024-05-01T10:00:00.250000Z')
    """
    secs, rem = divmod(int(ns), 1_000_000_000)
    text = str(np.datetime64(secs, "s"))
    return text + "Z" if rem == 0 else f"{text}.{rem // 1000:06d}Z"


def plain_ns(ts) -> int | None:
    """ns UTC of a timestamp validation would read the same way, else ``None``.

    Strings: ``YYYY-MM-DDTHH:MM:SS[.fraction][Z|+HH:MM]`` (years 1700-2200); numbers: epoch
    seconds as validation rounds them; timezone-aware or naive (UTC) datetimes.
    """
    if isinstance(ts, str):
        m = _ISO.match(ts)
        if m is None or not 1700 <= int(m.group(1)) <= 2200:
            return None
        zone = m.group(3)
        naive = ts[:len(ts) - len(zone)] if zone else ts
        try:
            ns = int(np.datetime64(naive, "ns").astype(np.int64))
        except ValueError:
            return None
        if zone and zone != "Z":
            sign = 1 if zone[0] == "+" else -1
            ns -= sign * (int(zone[1:3]) * 3600 + int(zone[4:6]) * 60) * 1_000_000_000
        return ns
    if isinstance(ts, Real) and not isinstance(ts, (bool, np.bool_)):
        v = float(ts)
        if not (math.isfinite(v) and TS_MIN_NS / 1e9 <= v <= TS_MAX_NS / 1e9):
            return None                      # out of range: the batch path rejects it
        return int(np.round(np.array([v]) * 1e9).astype(np.int64)[0])
    if isinstance(ts, pd.Timestamp) or hasattr(ts, "isoformat") and hasattr(ts, "tzinfo"):
        try:
            stamp = pd.Timestamp(ts)
        except (TypeError, ValueError):
            return None
        if stamp is pd.NaT or not 1700 <= stamp.year <= 2200:
            return None
        return int((stamp.tz_localize("UTC") if stamp.tzinfo is None
                    else stamp.tz_convert("UTC")).value)
    return None


def _number(v) -> float | None:
    if isinstance(v, (bool, np.bool_)) or not isinstance(v, Real):
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def observe_plain(mon, series, ts, price, quantity, controls: dict):
    """Process one plainly valid observation (module docstring), or return :data:`NOT_PLAIN`."""
    if not isinstance(series, str) or not series.strip():
        return NOT_PLAIN
    gi, vi = mon.gate.index.get(series), mon.book.index.get(series)
    p, q, ns = _number(price), _number(quantity), plain_ns(ts)
    lo, hi = mon.validation.min_value, mon.validation.max_value
    zero = q == 0.0 and mon.zero_as_data and math.copysign(1.0, q) > 0   # a Poisson zero
    if gi is None or vi is None or p is None or q is None or ns is None \
            or not (lo <= p <= hi and (lo <= q <= hi or zero)):
        return NOT_PLAIN                     # outside the accepted range: worded by the batch path
    if ns <= mon.book.last_obs.get(series, NAT):
        return NOT_PLAIN                     # a repeat or late row: the general path words it
    if ns > int(mon.clock_ns()) + int(mon.validation.max_future_s * 1e9):
        return NOT_PLAIN
    values = {}
    for name in mon.control_names:
        v = _number(controls.get(name)) if name in controls else None
        if v is None or abs(v) > hi or (name in mon.estimator.log_controls
                                         and not lo <= v <= hi):
            return NOT_PLAIN
        values[name] = v
    offset, e = None, None
    if mon.exposure_col:                     # Poisson exposure: validated as a logged control
        e = _number(controls.get(mon.exposure_col))
        if e is None or not lo <= e <= hi:
            return NOT_PLAIN
        offset = np.log(np.array([e]))
    gate = mon.gate
    saved = (gate.last_ts[gi], gate.ring[gi].copy(), gate.ring_ts[gi].copy(), gate.count[gi],
             gate.qring[gi].copy(), gate.qcount[gi])
    if mon.nan_medians.size != gate.last_ts.size:
        mon.nan_medians = np.full(gate.last_ts.size, np.nan)
    code = np.zeros(1, dtype=np.int8)
    price_arr = np.array([p])
    q_arr = np.array([q])
    with np.errstate(divide="ignore"):       # a zero kept as data: -inf, as validation has it
        lq = np.log(q_arr)
    ordered_checks(np.array([gi], dtype=np.int64), np.array([ns], dtype=np.int64),
                    np.log(price_arr), gate.last_ts, gate.ring, gate.ring_ts, gate.count,
                    np.int64(mon.validation.allowed_lateness_s * 1e9),
                    math.log(mon.validation.unit_ratio),
                    mon.validation.duplicate_policy == "reject_all", code, mon.nan_medians,
                    lq, gate.qring, gate.qcount, log_qratio(mon.validation))
    if code[0] != 0:                         # rejected: the kernel changed nothing
        return NOT_PLAIN
    try:
        return _run_and_commit(mon, series, vi, ns, p, q, values, price_arr, q_arr, lq, offset,
                               e)
    except BaseException:
        (gate.last_ts[gi], gate.ring[gi], gate.ring_ts[gi], gate.count[gi], gate.qring[gi],
         gate.qcount[gi]) = saved
        raise


def _run_and_commit(mon, series, vi, ns, p, q, values, price_arr, q_arr, lq, offset, exposure):
    specs = mon.estimator.control_specs
    X = design_matrix(price_arr, {c.name: np.array([values[c.name]]) for c in specs}, specs)
    y = q_arr if mon.zero_as_data else lq    # monitor.rows.prepare.response
    sid = np.zeros(1, dtype=np.int64)
    states = mon.book.states[[vi]].copy()
    kw = mon.run_extras(np.array([ns], dtype=np.int64), [series])
    if offset is not None:
        kw["offset"] = offset                # monitor.rows.prepare.offset_of
    res = mon.pipeline.run(sid, X, y, n_series=1, states=states, **kw)
    out, status = res.out[0], STATUS_LABELS[int(res.status[0])]
    ts = iso_z(ns)
    floats = [float(out[i]) for i in (K.O_BETA, K.O_SE, K.O_LO, K.O_HI, K.O_NEFF,
                                      K.O_INTERCEPT, K.O_RESID_SD, K.O_E, K.O_Z)]
    sql = [None if v != v else v for v in floats]
    band = K.BAND_NAMES.get(int(out[K.O_BAND])) if sql[2] is not None and sql[3] is not None \
        else None                            # the kind of the band (issue 13), as estimates_frame
    estimate = (series, ts, *sql[:5], status, *sql[5:], band)
    updates = mon.book.updates.get(series, 0) + 1
    prev = mon.book.last_status.get(series)
    keep = mon.estimates_every == 1 or updates % mon.estimates_every == 0 or prev != status
    changes = []
    records = getattr(res, "records", None)
    if records is None or len(records):
        est = pd.DataFrame({"ts": [ts]})
        changes = alert_changes(res, est, [series], sid)
    source = "api"
    row = mon.book.rows_read.get(source, 0) + 1
    gate_state = gate_text(mon.gate, mon.gate.index[series])
    last_obs = max(mon.book.last_obs.get(series, NAT), ns)
    state = {"pipeline": mon.state_json(res.states[0]), "gate": gate_state, "updates": updates,
             "last_status": status, "last_obs_ns": last_obs,
             "zero_skipped": mon.book.zero.get(series, 0)}
    now = wall_ts()
    controls = to_json({c: values[c] for c in mon.control_names}) if mon.control_names else None
    write_one(                   # one transaction: the row and the series' delay50_obs
        mon.store, observation=(series, ts, p, q, controls, source, row, exposure),
        estimate=estimate,
        keep=keep, now=now,
        checkpoint=(series, to_json(state), ts if last_obs == ns else iso_z(last_obs),
                    to_json({"row": row, "source": source}), now),
        offset=(source, "api", None, 1, 0, now, None, 0), changes=changes,
        delay50=mon.pipeline.delay50_obs(res.states)[0])
    mon.book.states[vi] = res.states[0]
    mon.book.updates[series] = updates
    mon.book.last_status[series] = status
    mon.book.last_obs[series] = last_obs
    mon.book.rows_read[source] = row
    if mon.wal.committed(1):                 # budget reached: the thread checkpoints, and a
        mon.store.bound_wal(mon.wal_max_bytes)   # log pinned by readers is truncated here
    return Estimate(series=series, ts=ts, beta=floats[0], beta_se=floats[1], beta_lo=floats[2],
                    beta_hi=floats[3], n_eff=floats[4], status=status)
