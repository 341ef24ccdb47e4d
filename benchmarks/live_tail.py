"""From a row landing in a tailed CSV to its alert in the outbox, with the service running.

Set-up: a :class:`monitor.live.service.Service` in this process (its APScheduler jobs in background
threads) tails ``feed.csv`` at a 1 s poll interval, with bounds ``[-1.0, -0.5]`` on the
elasticity (true b = -2, so every series leaves the bounds once its estimate is sure enough)
and a JSON-lines sink (so each alert gets an outbox row; delivery itself is not timed).

Which row opens each series' alert is found first by a dry run of the same rows through a
:class:`monitor.live.monitor.Monitor` on a scratch store. The feed then gets every series' rows up to
the one before its trigger row; once the service has committed them, for each series in turn
the benchmark waits until a chosen phase of the poll cycle (phases spread evenly over the
interval, in shuffled order, timed from the last commit seen), appends
the trigger row (one whole line, flushed) and polls the store's ``outbox`` read-only every 5 ms
until the alert's row is there. Expected: about half the poll interval plus one batch's time.
"""

from __future__ import annotations

import random
import sqlite3
import time

import numpy as np
import pandas as pd

from benchmarks.common import Context, Row, median


POLL_S = 1.0
BOUNDS = {"low": -1.0, "high": -0.5}


def _rows(n_series: int, length: int, seed: int = 23) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    names = [f"depot{i % 4:02d}/item{i:05d}" for i in range(n_series)]
    sid = np.repeat(np.arange(n_series), length)
    step = np.tile(np.arange(length), n_series)
    ts = pd.Timestamp("2024-02-01", tz="UTC") + pd.to_timedelta(step, unit="h")
    price = np.round(5.0 * np.exp(rng.normal(0, 0.12, sid.size)), 2)
    qty = np.round(np.exp(4.0 - 2.0 * np.log(price) + rng.normal(0, 0.15, sid.size)), 3)
    return pd.DataFrame({"series": np.array(names)[sid],
                         "ts": ts.strftime("%Y-%m-%dT%H:%M:%SZ"), "price": price,
                         "quantity": qty, "step": step})


def _config(feed, store, sink):
    from monitor.settings import validate

    return validate({
        "store": {"path": str(store)},
        "service": {"poll_interval_s": POLL_S, "delivery_interval_s": 3600.0,
                    "stale_check_s": 3600.0},
        "sources": {"feed": {"type": "csv", "path": str(feed), "poll_interval_s": POLL_S}},
        "sinks": {"log": {"type": "log", "path": str(sink)}},
        "bounds": BOUNDS,
    }, source="benchmark")


def _trigger_steps(ctx: Context, rows: pd.DataFrame, cfg) -> dict[str, int]:
    """Series -> step of the row at which its out_of_bounds alert opens (dry run)."""
    from monitor.live.monitor import Monitor

    scratch = ctx.tmp / "tail-dry.sqlite"
    with Monitor(scratch, cfg) as mon:
        mon.observe_many(rows[["series", "ts", "price", "quantity"]])
        opened = mon.store.rows("SELECT series, opened_ts FROM alerts WHERE kind = 'out_of_bounds'")
    for f in ctx.tmp.glob("tail-dry.sqlite*"):
        f.unlink()
    out = {}
    for r in opened:
        m = rows[(rows["series"] == r["series"]) & (rows["ts"] == r["opened_ts"])]
        if len(m):
            out[r["series"]] = int(m["step"].iat[0])
    return out


def _line(r) -> str:
    return f"{r.series},{r.ts},{r.price},{r.quantity}\n"


def run(ctx: Context) -> list[Row]:
    from monitor.live.service import Service

    n_series = ctx.size(8, 3)
    feed, store, sink = ctx.tmp / "feed.csv", ctx.tmp / "tail.sqlite", ctx.tmp / "alerts.jsonl"
    cfg = _config(feed, store, sink)
    rows = _rows(n_series, 120)
    trig = _trigger_steps(ctx, rows, cfg)
    if not trig:
        raise RuntimeError(f"no out_of_bounds alert in the dry run with bounds {BOUNDS}")
    series = [s for s in dict.fromkeys(rows["series"]) if s in trig]
    before = rows[rows["step"] < rows["series"].map(trig).fillna(-1)]
    with open(feed, "w") as fh:
        fh.write("series,ts,price,quantity\n")
        for r in before.itertuples(index=False):
            fh.write(_line(r))
    svc = Service(cfg, store=store, base=ctx.tmp)
    lat = []
    try:
        svc.start()
        ro = sqlite3.connect(f"file:{store}?mode=ro", uri=True, timeout=10)
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            got = ro.execute("SELECT coalesce(sum(rows_read), 0) FROM source_offsets "
                             "WHERE source = 'feed'").fetchone()[0]
            if got >= len(before):
                break
            time.sleep(0.05)
        else:
            raise RuntimeError("the service did not take in the prepared rows within 60 s")
        # stratified poll phases: sample i lands (i + 0.5) / K of a poll interval after the
        # last commit seen (a commit marks a poll), in shuffled order
        phases = [(i + 0.5) / len(series) for i in range(len(series))]
        random.Random(5).shuffle(phases)
        sql = ("SELECT count(*) FROM outbox o JOIN alerts a ON a.id = o.alert_id "
               "WHERE a.series = ? AND a.kind = 'out_of_bounds'")
        t_prev = time.perf_counter()
        for s, phase in zip(series, phases):
            time.sleep((phase * POLL_S - (time.perf_counter() - t_prev)) % POLL_S)
            r = rows[(rows["series"] == s) & (rows["step"] == trig[s])].iloc[0]
            with open(feed, "a") as fh:
                fh.write(_line(r))
                fh.flush()
                t0 = time.perf_counter()
            while ro.execute(sql, (s,)).fetchone()[0] == 0:
                if time.perf_counter() - t0 > 15:
                    raise RuntimeError(f"no outbox row for {s} 15 s after its trigger row")
                time.sleep(0.005)
            t_prev = time.perf_counter()
            lat.append(t_prev - t0)
        ro.close()
    finally:
        svc.stop()
        if svc.scheduler is not None:
            svc.scheduler.shutdown(wait=True)
        svc.close()
    for f in list(ctx.tmp.glob("tail.sqlite*")) + [feed, sink]:
        if f.exists():
            f.unlink()
    v = median(lat)
    return [Row(f"row appended to a tailed CSV -> its alert in the outbox, {POLL_S:g} s poll", v,
                "s", lat, target=f"report (expected ~{POLL_S / 2:g} s + one batch)",
                better="lower",
                check=(f"{len(lat)} alerts (out_of_bounds, bounds {BOUNDS['low']}..{BOUNDS['high']}"
                       f", true b -2), one per series, rows landing at phases spread evenly over the poll interval; min "
                       f"{min(lat):.2f} s, max {max(lat):.2f} s"))]
