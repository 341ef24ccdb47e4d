"""The live service: scheduled polling of every source, staleness alerts, alert delivery.

``elmon run --config elmon.toml`` builds a :class:`Service` and calls :meth:`Service.run`:

- one APScheduler 3.x interval job per source (``coalesce=True``, ``max_instances=1``,
  ``misfire_grace_time`` from ``[service] misfire_grace_s``): read the rows after the committed
  position in batches of at most ``batch_rows`` and commit each batch (observations,
  estimates, alert changes, checkpoints, rejects and the new position in one transaction,
  :meth:`monitor.live.monitor.Monitor.process_chunk`) until the source has nothing new;
- a staleness job (``stale_check_s``): a source with no new rows for longer than its
  ``stale_after_s``, or a series with no new observation for longer than
  ``series_stale_after_s`` (or its own ``stale_after_s`` setting), raises a ``stale`` alert,
  resolved automatically when rows arrive again;
- a delivery job (``delivery_interval_s``): reminders for alerts still open after
  ``reminder_every_s``, then the outbox through :func:`monitor.live.sinks.deliver_due` (retries with
  backoff; a failed delivery is never lost).

A bad row never stops the service (it is stored in ``rejects``); a source that cannot be read
is recorded in ``source_offsets.last_error`` (``elmon status``) and tried again at the next
poll. SIGTERM and SIGINT set a :class:`threading.Event`: the batch being processed finishes
and commits, no new batch starts, then ``scheduler.shutdown(wait=True)`` waits for the jobs
and the process exits with status 0. (A BackgroundScheduler with the main thread waiting on
the event shuts down cleanly; calling ``shutdown()`` inside a signal handler of a
BlockingScheduler does not.)

A process killed at any moment (SIGKILL, power cut after the last commit) loses nothing: on
start every series is restored from its checkpoint and every source resumes at its committed
position, so the store ends exactly as after an uninterrupted run.
"""

from __future__ import annotations

import datetime as dt
import logging
import signal
import threading
import time
from pathlib import Path

from monitor.errors import ConfigError, StoreError
from monitor.ingest.bounds_file import BoundsFileWatch, bounds_file_path, read_bounds_file
from monitor.ingest.factory import sources_from_config
from monitor.ingest.logio import column_names
from monitor.live import settings as service_config
from monitor.live.checkpoints import apply_pending_resets
from monitor.live.monitor import Monitor
from monitor.live.sinks import deliver_due, sinks_from_config
from monitor.sections import Config
from monitor.store import get_offset, send_reminders, wall_ts, write_batch
from monitor.store.bounds import load_series_bounds
from monitor.store.live import record_source_error, source_rows_at, stale_changes


log = logging.getLogger("elmon.service")


def config_folder(config: Config) -> Path:
    """The folder relative paths of ``config`` are taken from: the config file's, else the
    working directory."""
    if config.path and Path(config.path).is_file():
        return Path(config.path).resolve().parent
    return Path.cwd()


def configured_sinks(config: Config, base: Path) -> dict:
    """``[sinks.*]`` built by :func:`monitor.live.sinks.sinks_from_config`, a log sink's relative
    ``path`` and an e-mail sink's relative ``ca_file`` taken from ``base`` like the sources'
    paths."""
    specs = {}
    for name, spec in (config.section("sinks") or {}).items():
        spec = dict(spec) if isinstance(spec, dict) else spec
        for key in ("path", "ca_file"):
            if isinstance(spec, dict) and isinstance(spec.get(key), str) \
                    and not Path(spec[key]).expanduser().is_absolute():
                spec[key] = str(base / Path(spec[key]).expanduser())
        specs[name] = spec
    return sinks_from_config(specs)


class Service:
    """Sources, a :class:`~monitor.live.monitor.Monitor`, sinks and the jobs that tie them together.

    Parameters
    ----------
    config : Config
        The whole configuration (see :mod:`monitor.live.settings`).
    store : path or Store, optional
        Overrides ``[store] path``.
    base : Path, optional
        Folder that relative paths in the config are resolved against (the config file's).
    """

    def __init__(self, config: Config, store=None, base: Path | None = None):
        self.config = config
        self.settings = service_config.service_settings(config)
        base = Path(base) if base is not None else config_folder(config)
        if store is None:
            store = Path(service_config.store_settings(config)["path"]).expanduser()
            store = store if store.is_absolute() else base / store
        self.sources = sources_from_config(config, base)
        self.sinks = configured_sinks(config, base)   # env variables checked here
        self.monitor = Monitor(store, config)
        self.store = self.monitor.store
        self.stop_event = threading.Event()
        self._positions = {}
        for name in self.sources:
            row = get_offset(self.store, name)
            self._positions[name] = row["position"] if row else None
        self._last_rows = {**source_rows_at(self.store)}
        started = wall_ts()
        for name in self.sources:
            self._last_rows.setdefault(name, started)
        self._errors: dict[str, str | None] = {}
        #: held around each batch with the reset requests applied before it (source jobs run
        #: in the scheduler's threads; a reset must not fall inside another source's batch)
        self._batch_lock = threading.Lock()
        self.scheduler = None
        path = bounds_file_path(config, base)
        self._bounds_watch = BoundsFileWatch(path) if path is not None else None
        self._bounds_lock = threading.Lock()
        try:
            self.sync_bounds(strict=True)
        except Exception:
            self.monitor.close()
            raise

    def sync_bounds(self, strict: bool = False) -> int | None:
        """Load ``[bounds] file`` into the store's per-series bounds when the file changed
        since the last look (at start, then before each poll); returns the number of series
        loaded, or ``None`` when nothing was loaded.

        The file is applied all or nothing (:func:`monitor.store.bounds.load_series_bounds`,
        series created when new). A bad file refuses the start (``strict``); later, a bad
        version is logged once with every bad row named and the bounds loaded before stay in
        effect. Removing a line does not clear that series' bounds (``elmon bounds set NAME
        --low none --high none`` does).
        """
        watch = self._bounds_watch
        if watch is None:
            return None
        with self._bounds_lock:
            if not watch.changed():
                return None
            source = f"[bounds] file {str(watch.path)!r}"
            try:
                recs = load_series_bounds(self.store, read_bounds_file(watch.path),
                                          create=True, source=source)
            except (ConfigError, StoreError) as exc:
                if strict:
                    raise ConfigError(str(exc)) from None
                log.error("%s; the bounds loaded before stay in effect", exc)
                return None
        log.info("%s: bounds of %d series loaded", source, len(recs))
        return len(recs)

    # ------------------------------------------------------------------ jobs
    def poll(self, name: str) -> list:
        """Read and commit batches from source ``name`` until it has nothing new (or stop)."""
        src = self.sources[name]
        reports = []
        self.sync_bounds()
        try:
            with self._batch_lock:           # picked up even while the source is quiet
                self.apply_resets()
        except Exception as exc:
            log.error("series resets not applied yet: %s", exc)
        while not self.stop_event.is_set():
            position = self._positions.get(name)
            try:
                chunk = src.read(position, self.settings["batch_rows"])
                if chunk is None:
                    self._set_error(name, src.kind, None)
                    break
                with self._batch_lock:
                    self.apply_resets()
                    rep = self.monitor.process_chunk(chunk, name, src.kind)
            except Exception as exc:  # a source problem is recorded, never fatal
                msg = f"{type(exc).__name__}: {exc}"
                if self._errors.get(name) != msg:
                    log.error("source %s: %s", name, msg, exc_info=not _expected(exc))
                self._set_error(name, src.kind, msg)
                break
            self._errors[name] = None      # the commit cleared last_error
            self._positions[name] = chunk.position
            if rep.rows:
                self._last_rows[name] = wall_ts()
            reports.append(rep)
            log.info("source %s: %d rows (%d accepted, %d rejected, %d zero skipped), %d "
                     "alerts opened, %.3f s", name, rep.rows, rep.accepted, rep.rejected,
                     rep.zero_skipped, len(rep.alerts_opened), rep.seconds)
            if chunk.position == position and not rep.rows:
                break
        return reports

    def apply_resets(self) -> list[str]:
        """Apply the ``elmon series reset`` requests made since the last batch (the command
        cannot take the writer lock this service holds, so it records a request): each
        series starts afresh in memory and in its checkpoint before the next batch, and the
        state it had is never written back. Returns the series reset."""
        m = self.monitor
        done = apply_pending_resets(m.store, m.book, m.gate, m.pipeline)
        for series in done:
            log.warning("series %s reset (elmon series reset): it starts afresh at its next "
                        "row", series)
        return done

    @property
    def source_errors(self) -> dict[str, str]:
        """Sources whose last poll failed, with the error (``elmon run --once`` exits 2)."""
        return {name: msg for name, msg in self._errors.items() if msg}

    def _set_error(self, name: str, kind: str, message: str | None) -> None:
        if self._errors.get(name, "unset") != message:
            try:
                record_source_error(self.store, name, kind, message)
            except Exception as exc:  # the store itself failing must not end the job thread
                log.error("source %s: cannot record error: %s", name, exc)
                return
            self._errors[name] = message

    def check_stale(self, now=None) -> list[dict]:
        """Open / resolve ``stale`` alerts (one transaction); returns the changes applied."""
        limits = {name: float(spec.get("stale_after_s", 0.0))
                  for name, spec in self.config.section("sources").items()}
        try:
            changes = stale_changes(self.store, now, limits, self._last_rows,
                                    float(self.settings["series_stale_after_s"]))
            if changes:
                write_batch(self.store, alert_changes=changes, now=now)
                log.warning("staleness: %s", "; ".join(
                    f"{c['action']} stale {c['series']}" for c in changes))
        except Exception as exc:
            log.error("staleness check failed: %s", exc, exc_info=True)
            return []
        return changes

    def deliver(self, now=None) -> dict:
        """Reminders (if configured), then deliver the outbox rows that are due."""
        out = {"reminded": [], "delivered": 0, "retrying": 0, "failed": 0}
        try:
            every = self.settings["reminder_every_s"]
            if every > 0:
                out["reminded"] = send_reminders(self.store, every, now=now)
            if self.sinks:
                out.update(deliver_due(self.store, self.sinks, now=now,
                                       max_attempts=self.settings["delivery_max_attempts"],
                                       backoff=self.settings["delivery_backoff_s"],
                                       max_backoff=self.settings["delivery_max_backoff_s"]))
        except Exception as exc:
            log.error("delivery failed: %s", exc, exc_info=True)
        return out

    # ------------------------------------------------------------------ running
    def run_once(self) -> dict:
        """Poll every source until drained, check staleness, deliver; then return counts."""
        totals = {"rows": 0, "accepted": 0, "rejected": 0, "zero_skipped": 0, "batches": 0,
                  "alerts_opened": 0}
        for name in self.sources:
            for rep in self.poll(name):
                totals["batches"] += 1
                for key in ("rows", "accepted", "rejected", "zero_skipped"):
                    totals[key] += getattr(rep, key)
                totals["alerts_opened"] += len(rep.alerts_opened)
        totals["stale_changes"] = len(self.check_stale())
        totals["deliveries"] = self.deliver()
        return totals

    def start(self) -> None:
        """Start the scheduler (jobs run in its worker threads)."""
        from apscheduler.schedulers.background import BackgroundScheduler

        s = self.settings
        self.scheduler = BackgroundScheduler(
            timezone=dt.timezone.utc,
            job_defaults={"coalesce": True, "max_instances": 1,
                          "misfire_grace_time": max(1, int(round(s["misfire_grace_s"])))})
        first = dt.datetime.now(dt.timezone.utc)
        for name, spec in self.config.section("sources").items():
            every = float(spec.get("poll_interval_s", s["poll_interval_s"]))
            self.scheduler.add_job(self.poll, "interval", seconds=every, args=[name],
                                   id=f"poll:{name}", name=f"poll source {name}",
                                   next_run_time=first)
        self.scheduler.add_job(self.check_stale, "interval", seconds=s["stale_check_s"],
                               id="stale", name="staleness check")
        self.scheduler.add_job(self.deliver, "interval", seconds=s["delivery_interval_s"],
                               id="deliver", name="alert delivery", next_run_time=first)
        self.scheduler.start()

    def stop(self) -> None:
        """Ask the jobs to finish their current batch; :meth:`run` then shuts down."""
        self.stop_event.set()

    def run(self, install_signals: bool = True, ready=None) -> int:
        """Run until SIGTERM / SIGINT (or :meth:`stop`), then shut down cleanly; returns 0."""
        if install_signals and threading.current_thread() is threading.main_thread():
            for sig in (signal.SIGTERM, signal.SIGINT):
                signal.signal(sig, lambda *_: self.stop_event.set())
        self.start()
        log.info("elmon service running: store %s, %d series restored, sources %s",
                 self.store.path, len(self.monitor.series), ", ".join(self.sources) or "none")
        if ready is not None:
            ready(self)
        while not self.stop_event.wait(0.2):
            pass
        log.info("stopping: finishing the current batches")
        self.scheduler.shutdown(wait=True)
        self.close()
        log.info("stopped cleanly")
        return 0

    def close(self) -> None:
        self.monitor.close()

    def __enter__(self) -> "Service":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def ingest_file(path, store, config: Config | None = None, batch_rows: int | None = None,
                deliver: bool = True) -> dict:
    """Load a finished CSV or Parquet file through the service's path (``elmon ingest``).

    The file is a source named by its absolute path; each batch of ``batch_rows`` rows commits
    with the file's new offset, so a run stopped at any point (even by SIGKILL) continues
    where its last committed batch ended, and a run over a file already read adds nothing.
    Configured sinks get the alerts delivered at the end.

    Returns
    -------
    dict
        ``source``, ``start`` / ``end`` positions, ``resumed`` (a previous run had committed
        part of the file), ``nothing_new``, ``batches``, ``rows``, ``accepted``, ``rejected``,
        ``zero_skipped``, ``alerts_opened``, ``notices``, ``seconds``.
    """
    from monitor.ingest.factory import file_source

    config = config or Config()
    rows_per_batch = int(batch_rows or service_config.service_settings(config)["batch_rows"])
    if rows_per_batch < 1:
        from monitor.errors import ConfigError
        raise ConfigError(f"batch_rows = {rows_per_batch}: must be >= 1")
    name, src = file_source(path, column_names(config))
    sinks = configured_sinks(config, config_folder(config)) if deliver else {}
    t0 = time.perf_counter()
    out = {"source": name, "batches": 0, "rows": 0, "accepted": 0, "rejected": 0,
           "zero_skipped": 0, "alerts_opened": 0, "notices": []}
    bounds_path = bounds_file_path(config, config_folder(config))
    with Monitor(store, config) as mon:
        if bounds_path is not None:
            load_series_bounds(mon.store, read_bounds_file(bounds_path), create=True,
                               source=f"[bounds] file {str(bounds_path)!r}")
        row = get_offset(mon.store, name)
        position = row["position"] if row else None
        out["start"], out["resumed"] = position, position is not None
        while True:
            chunk = src.read(position, rows_per_batch)
            if chunk is None:
                break
            apply_pending_resets(mon.store, mon.book, mon.gate, mon.pipeline)
            rep = mon.process_chunk(chunk, name, src.kind)
            out["batches"] += 1
            for key in ("rows", "accepted", "rejected", "zero_skipped"):
                out[key] += getattr(rep, key)
            out["alerts_opened"] += len(rep.alerts_opened)
            if rep.notice:
                out["notices"].append(rep.notice)
            if chunk.position == position and not rep.rows:
                break
            position = chunk.position
        out["end"] = position
        if sinks:
            out["deliveries"] = deliver_due(mon.store, sinks)
    out["nothing_new"] = out["batches"] == 0
    out["seconds"] = time.perf_counter() - t0
    return out


def _expected(exc: Exception) -> bool:
    from monitor.errors import ElmonError
    return isinstance(exc, ElmonError)


