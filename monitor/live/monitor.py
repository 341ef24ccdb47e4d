"""The processing engine: rows from any source -> validation -> pipeline -> one committed batch.

:class:`Monitor` owns the live state of every series (estimator, detector and rule state in one
vector per series, and the validation gate's per-series state) and a writer connection to the
store. Each batch goes through the one row path (:mod:`monitor.rows.prepare`: check_rows ->
prepare_rows), then Pipeline.run -> estimates_frame. Validation runs in arrival order unless
``[validation] order = "time"`` (:func:`monitor.rows.prepare.order_of`), so the outcome never
depends on where batches were cut: with no lateness allowed every accepted
row of a series is newer than the one before, i.e. each series is processed in timestamp
order, and an in-order log gives the replay's estimates to the bit. Then
its observations, estimates (thinned per ``[store] estimates_every``), alert changes, rejects,
checkpoints and the source's new position are written in ONE transaction
(:func:`monitor.store.write_batch`). Memory is updated only after that commit, so a failed or
killed batch leaves no trace and the next start repeats it from the committed position.

What is checkpointed and how a restart restores it is in :mod:`monitor.live.checkpoints`.

Only one process may write a store's live state: the Monitor holds an exclusive lock on
``<store>.writer.lock`` (released when the process ends, even by SIGKILL).
"""

from __future__ import annotations

import math
import inspect
import threading
import time

import numpy as np
import pandas as pd

from monitor.errors import ValidationError
from monitor.estimators.settings import estimator_from_config
from monitor.live import settings as service_config
from monitor.live.batch import (DUPLICATE, LATE, NAT, BatchReport, alert_changes,
                                duplicates_against_store, extra_rejects, missing_column_rejects,
                                observation_frame, reject_frame, required_columns, zero_rows)
from monitor.live.checkpoints import checkpoints, restore, vector_to_json
from monitor.live.one_row import NOT_PLAIN, observe_plain
from monitor.pipeline.run import Pipeline
from monitor.rows.frames import estimates_frame
from monitor.rows.prepare import check_rows, offset_of, order_of, prepare_rows
from monitor.rows.validate import validation_from_config
from monitor.sections import Config
from monitor.store import Store, thin_estimates, wall_ts, write_batch, write_delay50
from monitor.groups.keys import split_key
from monitor.live.groups import GroupUpkeep, settings_from_config as group_settings_of
from monitor.store.live import release_writer_lock, series_bounds, take_writer_lock
from monitor.store.wal import WalCheckpointer, restart_pages_for
from monitor.types import Estimate


__all__ = ["Monitor", "BatchReport"]


class Monitor:
    """Live elasticity monitoring of many series over a store.

    Parameters
    ----------
    store : Store or path
        The store; a path is opened (created when missing).
    config : Config, optional
        ``[estimator]``, ``[validation]``, detector and rule sections, ``[store]``, ``[sinks]``.
    clock_ns : callable, optional
        Wall clock in ns since the epoch (the future-timestamp check); ``time.time_ns``.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> db = pathlib.Path(tempfile.mkdtemp()) / "m.sqlite"
    >>> with Monitor(db) as mon:
    ...     est = mon.observe("shop1/tea", "2024-05-01T00:00:00Z", price=4.0, quantity=120.0)
    >>> est.series, est.status
    ('shop1/tea', 'warming_up')
    """

    def __init__(self, store, config: Config | None = None, *, clock_ns=time.time_ns):
        self.config = config or Config()
        self.estimator = estimator_from_config(self.config)
        self.validation = validation_from_config(self.config)
        self.pipeline = Pipeline.from_config(self.config, self.estimator)
        store_sec = service_config.store_settings(self.config)
        self.estimates_every = store_sec["estimates_every"]
        self.wal_max_bytes = int(store_sec["wal_max_mb"] * 1e6)
        self.clock_ns = clock_ns
        self._own = not isinstance(store, Store)
        self.store = Store.open(store, create=True) if self._own else store
        self._lockfile = None
        self.wal = None
        try:
            self._lockfile = take_writer_lock(self.store.path)
            self.store.sinks = service_config.sink_names(self.config)
            self._lock = threading.RLock()
            #: controls the estimator reads (as given, then in logs), in its order
            self.control_names = list(self.estimator.controls) + list(self.estimator.log_controls)
            #: the Poisson model (issue 13): zero quantities are data, and its exposure column
            #: ("" without one); the one-row path reads both (monitor.live.one_row), and both
            #: paths store each row's exposure in observations.exposure (migration 11)
            self.zero_as_data = bool(getattr(self.estimator, "zero_quantity_ok", False)) \
                and self.validation.zero_policy == "keep"
            self.exposure_col = str(getattr(self.estimator, "exposure", "") or "")
            self._required = required_columns(self.estimator)
            key = list(self.validation.key)
            if len(key) > 1:             # composite ids are built from the key columns
                self._required = key + [c for c in self._required if c != "series"]
            self.groups = GroupUpkeep(self.store, group_settings_of(self.config))
            self._run_params = set(inspect.signature(self.pipeline.run).parameters)
            self._recorded: dict[str, dict] = {}   # series -> last written _in_effect record
            #: series -> own (low, high) or None, valid while _bounds_key holds (own_bounds)
            self._bounds: dict[str, tuple | None] = {}
            self._bounds_key = None
            self._fast = not self.groups.enabled   # observe tries monitor.live.one_row first
            self.plain_calls = 0              # observe calls that took the one-row path
            #: batch medians of the one-row path (all NaN: no batch), kept at the gate's size
            self.nan_medians = np.zeros(0)
            #: the engine's per-series memory (monitor.live.checkpoints.SeriesBook) and gate
            self.gate, self.book = None, None
            self._restore()
            #: WAL checkpoints in a thread of their own, outside the commits (issue 15); the
            #: log starts again at most every restart_pages frames (half of wal_max_mb at most)
            self.wal = WalCheckpointer(self.store, restart_pages=restart_pages_for(
                self.wal_max_bytes, self.store.scalar("PRAGMA page_size")))
        except BaseException:
            self.close()
            raise

    # ------------------------------------------------------------------ set-up

    def state_json(self, vec: np.ndarray) -> str:
        """A pipeline state vector as the checkpoint's text (binary form, base64)."""
        return vector_to_json(self.pipeline, vec)

    def _restore(self) -> None:
        """Every series from its checkpoint; each source's row count from its offset."""
        self.gate, self.book = restore(self.store, self.pipeline)

    @property
    def series(self) -> list[str]:
        """Names of the series the monitor holds state for."""
        return list(self.book.names)

    def state_of(self, series: str) -> np.ndarray:
        """A copy of a series' pipeline state vector."""
        return self.book.states[self.book.index[series]].copy()

    def _ensure(self, names: list[str]) -> np.ndarray:
        new = [n for n in names if n not in self.book.index]
        if new:
            for n in new:
                self.book.index[n] = len(self.book.names)
                self.book.names.append(n)
            self.book.states = np.vstack([self.book.states, self.pipeline.new_states(len(new))])
        return np.array([self.book.index[n] for n in names], dtype=np.int64)

    # ------------------------------------------------------------------ the Python API
    def observe(self, series: str, ts, price, quantity, **controls) -> Estimate | None:
        """Process one observation now (one committed batch, source ``api``).

        Returns the new :class:`~monitor.types.Estimate`, or ``None`` for a zero quantity
        kept out of the estimator (zero policy ``skip``). A rejected row is stored in
        ``rejects`` and raises :class:`~monitor.errors.ValidationError` naming the field.
        """
        if self._fast:
            with self._lock:
                done = observe_plain(self, series, ts, price, quantity, controls)
            if done is not NOT_PLAIN:
                self.plain_calls += 1
                return done
        frame = pd.DataFrame({"series": [series], "ts": [ts], "price": [price],
                              "quantity": [quantity], **{k: [v] for k, v in controls.items()}})
        key = self.validation.key
        if len(key) > 1:                    # a composite id given whole: its parts as columns
            parts = split_key(series, len(key))
            frame = frame.assign(**{c: [p] for c, p in zip(key, parts)})
        rep = self.observe_many(frame)
        if rep.rejected:
            r = rep.rejects.iloc[0]
            raise ValidationError(r["reason"], field=r["field"], value=r["value"], row=r["row"])
        if not len(rep.estimates):
            return None
        e = rep.estimates.iloc[-1]
        return Estimate(series=e["series"], ts=e["ts"], beta=float(e["beta"]),
                        beta_se=float(e["beta_se"]), beta_lo=float(e["beta_lo"]),
                        beta_hi=float(e["beta_hi"]), n_eff=float(e["n_eff"]), status=e["status"])

    def observe_many(self, frame: pd.DataFrame, source: str = "api") -> BatchReport:
        """Process a frame of observations (columns series, ts, price, quantity, controls)."""
        return self.process_batch(frame, source, None, kind="api")

    def process_chunk(self, chunk, source: str, kind: str) -> BatchReport:
        """Process a :class:`monitor.ingest.base.Chunk` read from a source and commit its position."""
        return self.process_batch(chunk.frame, source, chunk.position, kind=kind, rows=chunk.rows,
                                  pre_rejects=chunk.rejects, notice=chunk.notice,
                                  label=chunk.label, consumed=chunk.consumed,
                                  notice_kind=chunk.notice_kind)

    # ------------------------------------------------------------------ one batch
    def process_batch(self, frame: pd.DataFrame, source: str, new_position: dict | None, *,
                      kind: str = "api", rows: np.ndarray | None = None, pre_rejects=None,
                      notice: str | None = None, label: str | None = None,
                      consumed: int | None = None,
                      notice_kind: str = "source_reset") -> BatchReport:
        """Validate, run and commit one batch; see the module docstring.

        ``rows`` are the source's row numbers of ``frame`` (increasing; default: continuing
        the source's count), ``pre_rejects`` lines the source could not split into fields,
        ``notice`` a source problem to report (opens an alert of kind ``notice_kind``: by
        default ``source_reset``; ``source_error`` for a skipped file), ``label`` the
        ``source`` text of stored rows, ``consumed`` the source rows accounted for.
        """
        t0 = time.perf_counter()
        frame = pd.DataFrame() if frame is None else frame.reset_index(drop=True)
        n_pre = 0 if pre_rejects is None else len(pre_rejects)
        with self._lock:
            if rows is None:
                base = self.book.rows_read.get(source, 0)
                rows = np.arange(base + 1, base + len(frame) + 1, dtype=np.int64)
            rows = np.asarray(rows, dtype=np.int64)
            consumed = len(frame) + n_pre if consumed is None else int(consumed)
            label = label or source
            snap = self._snapshot()
            try:
                plan = self._plan(frame, rows, label, source)
                rejects = reject_frame([pre_rejects, *plan["rejects"]], label)
                changes = plan["changes"]
                if notice:
                    changes = changes + [{"action": "open", "series": f"source:{source}",
                                          "kind": notice_kind, "ts": wall_ts(),
                                          "beta": None, "beta_lo": None, "beta_hi": None,
                                          "message": notice, "severity": "warning"}]
                offset = {"kind": kind, "position": new_position, "rows_read": consumed,
                          "rows_rejected": len(rejects), "last_error": notice}
                kept, est = plan["kept"], plan["estimates"]
                record = self._in_effect(list(plan["checkpoints"]))
                with self.store.atomic():     # the batch and the series' delay50_obs
                    summary = write_batch(
                        self.store, observations=plan["observations"],
                        estimates=kept if kept is not None and len(kept) else None,
                        latest_estimates=est if len(est) else None, alert_changes=changes,
                        checkpoints=plan["checkpoints"] or None, offsets={source: offset},
                        rejects=rejects if len(rejects) else None, series=record or None)
                    write_delay50(self.store, plan["delay50"])
            except BaseException:
                self._rollback(snap)     # a failed commit leaves memory as it was before
                raise
            self._commit(plan)
            self._recorded.update({r["series"]: r for r in record})
            self.book.rows_read[source] = self.book.rows_read.get(source, 0) + consumed
            self.groups.after_batch(plan["checkpoints"])   # pooled latest, group alerts
            self.wal.committed(max(consumed, 1))          # background checkpoint on budget
            self.store.bound_wal(self.wal_max_bytes)      # readers cannot grow it for good
        return BatchReport(source=source, rows=consumed, accepted=plan["accepted"],
                           rejected=len(rejects), zero_skipped=plan["zero_count"],
                           series=len(plan["checkpoints"]),
                           alerts_opened=summary["alerts_opened"],
                           alerts_resolved=summary["alerts_resolved"], position=new_position,
                           notice=notice, seconds=time.perf_counter() - t0,
                           estimates=plan["estimates"], rejects=rejects)

    def _plan(self, frame: pd.DataFrame, rows: np.ndarray, label: str, source: str) -> dict:
        """Everything one batch writes, computed without touching the store's contents."""
        empty = {"observations": None, "kept": None, "estimates": pd.DataFrame(), "delay50": {},
                 "changes": [], "checkpoints": {}, "rejects": [], "accepted": 0,
                 "zero_count": 0, "states": None, "touched": {}}
        if not len(frame):
            return empty
        missing = [c for c in self._required if c not in frame.columns]
        if missing:
            return {**empty, "rejects": [missing_column_rejects(frame, rows, missing)]}
        v = check_rows(frame, self.estimator, settings=self.validation, gate=self.gate,
                       now_ns=int(self.clock_ns()), rows=rows,
                       order=order_of(self.validation, "arrival"))
        good = v.good
        zeros = zero_rows(frame, v.zero_skipped, self.control_names, self.exposure_col) \
            if len(v.zero_skipped) else None

        # repeats the gate cannot see (late copies of stored times, zero-quantity rows)
        cand = pd.concat([good[["row", "series", "ts"]].assign(zero=False),
                          zeros[["row", "series", "ts"]].assign(zero=True)
                          if zeros is not None else None], ignore_index=True)
        seen = {n: self.book.last_obs.get(n, NAT) for n in cand["series"].unique().tolist()}
        dup, late = duplicates_against_store(
            self.store, cand, seen, self.validation.duplicate_policy == "reject_all",
            int(self.validation.allowed_lateness_s * 1e9))
        late &= cand["zero"].to_numpy()
        extra = []
        for mask, why in ((dup, DUPLICATE), (late, LATE)):
            if mask.any():
                bad_rows = cand["row"].to_numpy()[mask]
                extra.append(pd.DataFrame(extra_rejects(frame, np.searchsorted(rows, bad_rows),
                                                        bad_rows, why)))
        drop = set(cand["row"].to_numpy()[dup | late].tolist())
        if drop:
            good = good[~good["row"].isin(drop)].reset_index(drop=True)
            if zeros is not None:
                zeros = zeros[~zeros["row"].isin(drop)].reset_index(drop=True)

        plan = {**empty, "rejects": [v.rejects, *extra], "accepted": len(good)}
        touched: dict[str, dict] = {}
        obs_parts = []
        if len(good):
            sid, X, y, names = prepare_rows(good, self.estimator)
            glob = self._ensure(names)
            states = self.book.states[glob].copy()
            kw = self.run_extras(good["ts"].to_numpy(dtype=np.int64), names)
            res = self.pipeline.run(sid, X, y, n_series=len(names), states=states,
                                    offset=offset_of(good, self.estimator), **kw)
            est = estimates_frame(good, res.out, res.status)
            plan["estimates"] = est
            plan["kept"] = thin_estimates(
                est, self.estimates_every,
                previous_status={s: self.book.last_status[s] for s in names if s in self.book.last_status},
                start_count={s: self.book.updates.get(s, 0) for s in names})
            plan["changes"] = alert_changes(res, est, names, sid)
            plan["states"] = (glob, res.states)
            plan["delay50"] = dict(zip(names, self.pipeline.delay50_obs(res.states)))  # issue 12
            # rows are in arrival order (each series' accepted rows in time order unless a
            # lateness is allowed): per series, the last row processed and the newest time
            m, idx = len(names), np.arange(len(sid))
            count = np.bincount(sid, minlength=m)
            last = np.zeros(m, dtype=np.int64)
            last[sid] = idx                       # repeated indices: the last one is kept
            newest = np.full(m, NAT, dtype=np.int64)
            np.maximum.at(newest, sid, good["ts"].to_numpy(dtype=np.int64))
            top = np.zeros(m, dtype=np.int64)
            np.maximum.at(top, sid, good["row"].to_numpy(dtype=np.int64))
            status = est["status"].to_numpy()
            for k in range(m):
                s = names[k]
                touched[s] = {"updates": self.book.updates.get(s, 0) + int(count[k]),
                              "last_status": status[last[k]], "row": int(top[k]),
                              "ts": int(newest[k]), "vec": res.states[k]}
            obs_parts.append(observation_frame(good, self.control_names, label,
                                               est["ts"].to_numpy(), self.exposure_col))
        if zeros is not None and len(zeros):
            zc = zeros.groupby("series").agg(n=("row", "size"), row=("row", "max"),
                                             ts=("ts", "max"))
            self._ensure(list(zc.index))
            for s, r in zc.iterrows():
                t = touched.setdefault(s, {"updates": self.book.updates.get(s, 0),
                                           "last_status": self.book.last_status.get(s),
                                           "row": 0, "ts": NAT, "vec": None})
                t["zero"] = int(r["n"])
                t["row"] = max(t["row"], int(r["row"]))
                t["zero_ts"] = int(r["ts"])
            obs_parts.append(observation_frame(zeros, self.control_names, label,
                                               exposure=self.exposure_col))
            plan["zero_count"] = len(zeros)
        if obs_parts:
            plan["observations"] = pd.concat(obs_parts, ignore_index=True)
        plan["touched"] = touched
        plan["checkpoints"] = checkpoints(self.book, self.gate, self.pipeline, touched, source)
        return plan

    def _in_effect(self, names: list[str]) -> list[dict]:
        """Forgetting factor and elasticity bounds in effect for ``names`` (the series' own
        bounds, else ``[bounds]``; NULL for an unset side), for the ``series`` table's record
        columns ``forgetting``, ``bound_low``, ``bound_high`` (issue 16: the dashboard draws
        them). Only series whose record changed since the last committed write are returned."""
        if not names:
            return []
        lam = getattr(self.estimator, "forgetting", None)
        low, high = (self.pipeline.bounds.limits() if hasattr(self.pipeline, "bounds")
                     else (-math.inf, math.inf))
        own = self.own_bounds(names)
        out = []
        for n in names:
            o = own.get(n, (None, None))
            lo = o[0] if o[0] is not None else low
            hi = o[1] if o[1] is not None else high
            rec = {"series": n, "forgetting": None if lam is None else float(lam),
                   "bound_low": float(lo) if math.isfinite(lo) else None,
                   "bound_high": float(hi) if math.isfinite(hi) else None}
            if self._recorded.get(n) != rec:
                out.append(rec)
        return out

    def own_bounds(self, names: list[str]) -> dict[str, tuple]:
        """:func:`monitor.store.live.series_bounds` of ``names`` through a cache.

        Each series' own bounds (or their absence) are read from the ``series`` table once and
        kept. The whole cache is dropped when they may have changed: when another connection
        (another process: a dashboard, ``elmon``) committed anything since the last look
        (``PRAGMA data_version`` changed, one cheap statement per call) or when this store
        connection wrote per-series bounds (``Store.bounds_version``, counted by
        :func:`monitor.store.write_batch` for settings with ``low`` or ``high`` and by
        :mod:`monitor.store.bounds`). A series' entry is ``None`` when it has no own bounds.
        """
        key = (self.store.scalar("PRAGMA data_version"), self.store.bounds_version)
        if key != self._bounds_key:
            self._bounds.clear()
            self._bounds_key = key
        cache = self._bounds
        missing = [n for n in names if n not in cache]
        if missing:
            found = series_bounds(self.store, missing)
            for n in missing:
                cache[n] = found.get(n)
        return {n: cache[n] for n in names if cache[n] is not None}

    def run_extras(self, ts: np.ndarray, names: list[str]) -> dict:
        """Optional arguments of ``Pipeline.run``: row times, series names (for messages) and
        each series' own elasticity bounds from the store's ``series`` table (a side not set
        there keeps the ``[bounds]`` limit)."""
        kw = {}
        if "ts" in self._run_params:
            kw["ts"] = ts
        if "names" in self._run_params:
            kw["names"] = names
        if {"low", "high"} <= self._run_params and hasattr(self.pipeline, "bounds"):
            own = self.own_bounds(names)
            if own:
                low, high = self.pipeline.bounds.limits()
                pick = lambda n, i, dflt: own[n][i] if n in own and own[n][i] is not None \
                    else dflt  # noqa: E731
                kw["low"] = np.array([pick(n, 0, low) for n in names], dtype=np.float64)
                kw["high"] = np.array([pick(n, 1, high) for n in names], dtype=np.float64)
        return kw


    def _snapshot(self) -> dict:
        """Copies of everything ``_plan`` may change in memory before the commit.

        The validation gate (every attribute: its series index and each per-series array,
        the recent-timestamp ring included) and the engine's series index, names and state
        matrix. A batch whose transaction fails (store locked past the busy timeout, disk
        full, an I/O error) is rolled back to this, so its retry sees exactly the state an
        untouched monitor has: no row of it is then taken for a repeat of itself, and no new
        series keeps a gate slot filled by the failed attempt.

        The gate's arrays are changed in place by the ordered checks, so they are copied;
        the state matrix is only replaced (``_ensure`` stacks a new one, ``_commit`` writes
        after the transaction), so keeping the reference is enough.
        """
        gate = {k: (v.copy() if hasattr(v, "copy") else v) for k, v in vars(self.gate).items()}
        return {"gate": gate, "index": dict(self.book.index), "names": list(self.book.names),
                "states": self.book.states}

    def _rollback(self, snap: dict) -> None:
        """Put back the in-memory state saved by :meth:`_snapshot`."""
        for k in list(vars(self.gate)):
            if k not in snap["gate"]:
                delattr(self.gate, k)
        for k, v in snap["gate"].items():
            setattr(self.gate, k, v)
        self.book.index, self.book.names = snap["index"], snap["names"]
        self.book.states = snap["states"]

    def _commit(self, plan: dict) -> None:
        """Move the committed batch's state into memory (only after the transaction)."""
        if plan["states"] is not None:
            glob, states = plan["states"]
            self.book.states[glob] = states
        for s, t in plan["touched"].items():
            self.book.updates[s] = t["updates"]
            if t["last_status"] is not None:
                self.book.last_status[s] = t["last_status"]
            self.book.last_obs[s] = t["last_obs"]
            self.book.zero[s] = self.book.zero.get(s, 0) + t.get("zero", 0)

    # ------------------------------------------------------------------ closing
    def close(self) -> None:
        """Stop the WAL checkpoint thread, close the store (when the Monitor opened it) and
        release the writer lock."""
        if self.wal is not None:
            self.wal.close()
            self.wal = None
        if self._own and self.store is not None:
            self.store.close()
        if self._lockfile is not None:
            release_writer_lock(self._lockfile)
            self._lockfile = None

    def __enter__(self) -> "Monitor":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"<Monitor {str(self.store.path)!r}: {len(self.book.names)} series>"
