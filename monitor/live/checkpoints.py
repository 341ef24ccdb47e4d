"""What the engine checkpoints per series, and how a restart restores it.

A series' checkpoint (``checkpoints.state``, JSON, written in the same transaction as the
batch that produced it)::

    {"pipeline": "f8:...",     # the pipeline's state vector (estimator + detectors + rules):
                               # "f8:" + base64 of its float64 values, little-endian (issue 15;
                               # stores written before hold a JSON list of floats, still read)
                               # (null after `elmon series reset`: a new series' state)
     "gate": "g8:...",         # SeriesGate (duplicates, lateness, units): "g8:" + base64 of
                               # one binary record (monitor.rows.gate_state); stores written
                               # before hold an object {"last_ts", "ring", "ring_ts", "count",
                               # "qring", "qcount"}, still read (after a reset: an object with
                               # only last_ts and count = 0)
     "updates": n,             # estimator updates so far (estimate thinning counts from it)
     "last_status": "ok",      # status of the last update (thinning keeps status changes)
     "last_obs_ns": t,         # newest observation time, zero-quantity rows included
     "zero_skipped": z}        # zero-quantity rows kept out of the estimator

``checkpoints.last_ts`` is the newest observation time as ISO text and ``last_pos`` the source
and row of the last row processed. The state vector's bytes are stored as they are (the
older JSON list holds Python's shortest round-trip repr, NaN as null), so a restored vector
equals the saved one bit for bit and a resumed run continues exactly as an uninterrupted one.
Encoding 179 floats this way takes about 2 us, against 60-200 us as a JSON list. Each source's row count comes back from
``source_offsets.rows_read``.
"""

from __future__ import annotations

import base64
from dataclasses import dataclass, field

import numpy as np

from monitor.errors import ConfigError, StoreError, ValidationError
from monitor.estimators.rls import floats_from_json, floats_to_json
from monitor.live.batch import NAT
from monitor.rows.gate_state import gate_bytes, gate_parts, gate_text, record_dtype
from monitor.rows.isotime import format_ts
from monitor.rows.validate import SeriesGate
from monitor.store import from_json
from monitor.store.live import (apply_series_reset, checkpoint_texts, pending_series_resets,
                                rows_read_by_source)


#: prefix of the binary form of a state vector in a checkpoint
BINARY_PREFIX = "f8:"


def vector_to_json(pipeline, vec: np.ndarray) -> str:
    """A state vector as checkpoint text: ``"f8:"`` + base64 of its float64 values in
    little-endian byte order (every bit kept, NaN payloads included). ``pipeline`` is
    unused (the vector's length is checked when read back)."""
    raw = np.ascontiguousarray(vec, dtype="<f8").tobytes()
    return BINARY_PREFIX + base64.b64encode(raw).decode("ascii")


def vector_from_json(pipeline, obj) -> np.ndarray:
    """Inverse of :func:`vector_to_json`; also reads the JSON list of floats of stores written
    before the binary form (``Pipeline.state_from_json``: NaN as null, infinities as text).
    Raises :class:`ConfigError` for a length the pipeline does not have."""
    if isinstance(obj, str) and obj.startswith(BINARY_PREFIX):
        try:
            raw = base64.b64decode(obj[len(BINARY_PREFIX):].encode("ascii"), validate=True)
        except ValueError as exc:
            raise ConfigError(f"checkpoint state is not base64 text ({exc})") from None
        if len(raw) % 8:
            raise ConfigError(f"checkpoint state holds {len(raw)} bytes, not whole float64 "
                              f"values")
        vec = np.frombuffer(raw, dtype="<f8").astype(np.float64)
        if hasattr(pipeline, "checked_state"):
            return pipeline.checked_state(vec)
        size = getattr(pipeline, "state_size", vec.size)
        if vec.size != size:
            raise ConfigError(f"checkpoint state has length {vec.size}; this pipeline needs "
                              f"{size} (estimator controls or layout changed)")
        return vec
    if hasattr(pipeline, "state_from_json"):
        return np.asarray(pipeline.state_from_json(obj), dtype=np.float64)
    return floats_from_json(obj)


def _changed_model(series: str, what: str) -> StoreError:
    return StoreError(f"checkpoint of series {series!r}: {what}; the store was written with "
                      f"another model configuration (use a new store or the old configuration)")


@dataclass
class SeriesBook:
    """The engine's memory of every series besides the validation gate, kept by
    :class:`monitor.live.monitor.Monitor` and filled from the checkpoints by :func:`restore`.

    ``index[name]`` is the series' row of ``states`` (``len(names) x width`` pipeline vectors,
    in ``names`` order); ``updates``, ``last_status``, ``last_obs`` (ns) and ``zero`` are the
    checkpoint's fields per series; ``rows_read`` each source's committed row count.
    """

    width: int
    index: dict = field(default_factory=dict)
    names: list = field(default_factory=list)
    states: np.ndarray | None = None
    updates: dict = field(default_factory=dict)
    last_status: dict = field(default_factory=dict)
    last_obs: dict = field(default_factory=dict)
    zero: dict = field(default_factory=dict)
    rows_read: dict = field(default_factory=dict)

    def __post_init__(self):
        if self.states is None:
            self.states = np.zeros((0, self.width), dtype=np.float64)


def _gate_arrays(gate: SeriesGate, names: list[str], parts: list) -> None:
    """Set every restored series' gate state at once (``parts[k]`` of ``names[k]``: the raw
    binary record (:func:`monitor.rows.gate_state.gate_bytes`) or, for an older checkpoint,
    the tuple of :func:`monitor.rows.gate_state.gate_parts`): one array per field, instead of
    growing the gate's arrays one series at a time (quadratic: 100k series took 170 s that way). The
    binary records are decoded together by one ``np.frombuffer``."""
    window = gate.ring.shape[1]
    n = len(names)
    gate.index = {name: k for k, name in enumerate(names)}
    binary = np.fromiter((isinstance(p, bytes) for p in parts), dtype=bool, count=n)
    rec = np.zeros(n, dtype=record_dtype(window))
    if binary.any():
        rec[binary] = np.frombuffer(b"".join(p for p in parts if isinstance(p, bytes)),
                                    dtype=record_dtype(window))
    for k in np.flatnonzero(~binary):
        last, ring, ring_ts, count, qring, qcount = parts[k]
        rec[k] = (last, count, qcount, ring, ring_ts, qring)
    gate.last_ts = rec["last_ts"].astype(np.int64)
    gate.ring = rec["ring"].astype(np.float64).reshape(n, window)
    gate.ring_ts = rec["ring_ts"].astype(np.int64).reshape(n, window)
    gate.count = rec["count"].astype(np.int64)
    gate.qring = rec["qring"].astype(np.float64).reshape(n, window)
    gate.qcount = rec["qcount"].astype(np.int64)


def _binary_vector(obj, width: int) -> bytes | None:
    """The raw bytes of a binary state vector of exactly ``width`` floats, else ``None`` (an
    older JSON list or another length: decoded one by one by :func:`vector_from_json`)."""
    if not (isinstance(obj, str) and obj.startswith(BINARY_PREFIX)):
        return None
    try:
        raw = base64.b64decode(obj[len(BINARY_PREFIX):].encode("ascii"), validate=True)
    except ValueError:
        return None
    return raw if len(raw) == 8 * width else None


def restore(store, pipeline) -> tuple[SeriesGate, SeriesBook]:
    """The validation gate and the series book of a store's checkpoints and offsets.

    One pass over the checkpoints in blocks (:func:`monitor.store.live.checkpoint_texts`):
    each state vector's bytes are collected and the state matrix is built from them in one
    ``np.frombuffer`` (bit for bit the saved values), the gate's arrays are filled in one go.
    A restart with 100k series takes seconds (``make bench``, group ``restart``), not the
    minutes of growing every array per series.
    """
    gate = SeriesGate()
    width = pipeline.new_states(1).shape[1]
    window = gate.ring.shape[1]
    book = SeriesBook(width=width)
    chunks, fresh = [], None
    gate_names, gate_rows = [], []
    for series, text in checkpoint_texts(store):
        st = from_json(text) or {}
        obj = st.get("pipeline")
        if obj is None:                       # reset (elmon series reset): a new series' state
            if fresh is None:
                fresh = np.ascontiguousarray(pipeline.new_states(1)[0], dtype="<f8").tobytes()
            raw = fresh
        else:
            raw = _binary_vector(obj, width)
            if raw is None:
                try:
                    vec = vector_from_json(pipeline, obj)
                except (ConfigError, ValidationError) as exc:
                    raise _changed_model(series, str(exc)) from None
                if vec.shape != (width,):
                    raise _changed_model(series, f"a state of length {vec.size}, this "
                                                 f"configuration needs {width}")
                raw = np.ascontiguousarray(vec, dtype="<f8").tobytes()
        book.index[series] = len(book.names)
        book.names.append(series)
        chunks.append(raw)
        if st.get("gate") is not None:
            try:
                rec = gate_bytes(st["gate"], window)
                gate_rows.append(rec if rec is not None else gate_parts(st["gate"], window))
            except (ConfigError, ValueError, KeyError, TypeError) as exc:
                raise _changed_model(series, f"gate state unreadable ({exc})") from None
            gate_names.append(series)
        book.updates[series] = int(st.get("updates", 0))
        if st.get("last_status") is not None:
            book.last_status[series] = st["last_status"]
        book.last_obs[series] = int(st.get("last_obs_ns", NAT))
        book.zero[series] = int(st.get("zero_skipped", 0))
    n = len(book.names)
    book.states = np.frombuffer(b"".join(chunks), dtype="<f8").astype(np.float64) \
        .reshape(n, width)
    del chunks
    _gate_arrays(gate, gate_names, gate_rows)
    book.rows_read = rows_read_by_source(store)
    if not getattr(store, "readonly", False):
        apply_pending_resets(store, book, gate, pipeline)   # requested while no one applied
    return gate, book


def checkpoints(book: SeriesBook, gate: SeriesGate, pipeline, touched: dict[str, dict],
                source: str) -> dict[str, dict]:
    """The checkpoint row of every series a batch touched.

    ``touched[series]`` holds ``updates``, ``last_status``, ``row`` (last source row), ``ts``
    (newest processed time, ns), ``vec`` (new state vector or ``None``) and, for zero rows,
    ``zero`` and ``zero_ts``; ``last_obs`` is set on each for the commit.
    """
    names = list(touched)
    newest = np.array([max(book.last_obs.get(s, NAT), touched[s]["ts"],
                           touched[s].get("zero_ts", NAT)) for s in names], dtype=np.int64)
    text = format_ts(np.where(newest == NAT, 0, newest)) if len(names) else []
    out = {}
    for s, last_obs, iso in zip(names, newest.tolist(), text):
        t = touched[s]
        vec = t["vec"] if t["vec"] is not None else book.states[book.index[s]]
        gstate = gate_text(gate, gate.index[s]) if s in gate.index else None
        t["last_obs"] = last_obs
        state = {"pipeline": vector_to_json(pipeline, vec), "gate": gstate,
                 "updates": t["updates"], "last_status": t["last_status"],
                 "last_obs_ns": last_obs, "zero_skipped": book.zero.get(s, 0) + t.get("zero", 0)}
        out[s] = {"state": state, "last_ts": iso if last_obs != NAT else None,
                  "last_pos": {"source": source, "row": t["row"]}}
    return out


def reset_in_memory(book: SeriesBook, gate: SeriesGate, pipeline, series: str) -> None:
    """A series' memory as :func:`restore` builds it from a reset checkpoint
    (:func:`monitor.store.live.fresh_state`): a new series' state vector, no updates and no
    last status, the gate's recent prices and quantities cleared (its newest time kept)."""
    if series in book.index:
        book.states[book.index[series]] = pipeline.new_states(1)[0]
    book.updates[series] = 0
    book.last_status.pop(series, None)
    if series in gate.index:
        i = gate.index[series]
        gate.ring[i] = 0.0
        gate.ring_ts[i] = 0
        gate.count[i] = 0
        gate.qring[i] = 0.0
        gate.qcount[i] = 0


def apply_pending_resets(store, book: SeriesBook, gate: SeriesGate, pipeline) -> list[str]:
    """Apply the reset requests of ``elmon series reset`` made while this process held the
    writer lock (:func:`monitor.store.live.request_series_reset`): each in its own
    transaction (checkpoint and request), then in memory. Called before every batch by the
    service, and at every start; the caller makes sure no batch runs meanwhile. Returns the
    series reset, in request order."""
    done = []
    for req in pending_series_resets(store):
        apply_series_reset(store, req["id"], req["series"])
        reset_in_memory(book, gate, pipeline, req["series"])
        done.append(req["series"])
    return done
