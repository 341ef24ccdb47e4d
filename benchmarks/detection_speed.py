"""Speed of the pipeline (estimator + detectors + rules), against river's PageHinkley and ADWIN.

Part of the ``detection`` group of ``make bench`` (:mod:`benchmarks.detection`; the detection
quality grid is :mod:`benchmarks.detection_grid`).

Rows: 10,000 invented series x 1,000 hourly steps in arrival order; every 10th series has its
elasticity moved by -0.8 from step 600 (a step change pivoting at the base price). The pipeline
is :meth:`monitor.pipeline.run.Pipeline.run` with the default ``[detectors]`` and ``[rules]``
(the level and slope charts, sign flip, low variation, the alert policy) and ``[bounds] low =
-3.5, high = -0.5``, forgetting 0.995; states fresh per run. Target (issue 8): >= 15M obs/s.

References, on the first 20 series (20,000 rows, two of them changed), one detector per
series, fed the standardized innovations z of elmon's own timed run (NaN while warming up
skipped):

- river ``PageHinkley(min_instances=30, delta=0.5, threshold=h, alpha=1, mode="both")`` with h
  elmon's designed Page-Hinkley threshold; the check: elmon's streaming
  :class:`monitor.detectors.PageHinkley` with the same parameters on the same values raises
  alarms at the same indices;
- river ``ADWIN()`` (defaults): a different test (adaptive windows on the mean); its alarm counts
  on the changed and unchanged series are shown, not expected to match anything of elmon's.
"""

from __future__ import annotations

import time

import numpy as np

from benchmarks.common import Context, Row, median, rate_row, share_note, speed_ratio, timed
from benchmarks.data import panel


LAM = 0.995
CHANGE_AT, CHANGE_BY, EVERY = 600, -0.8, 10


def _config(**sections):
    from monitor.settings import validate

    data = {"estimator": {"forgetting": LAM}, "bounds": {"low": -3.5, "high": -0.5}}
    data.update(sections)
    return validate(data, source="benchmark")


#: every chart and rule switched off: what the pipeline step costs beyond the estimator anyway
#: (the split GLR, the default change detector, still runs: it has no off switch)
ALL_OFF = {"detectors": {"level_chart": "none", "slope_chart": "none"},
           "rules": {"out_of_bounds": False, "sign_flip": False, "low_variation": False}}
#: the same with the previous charts' family in place of the split GLR, its charts off (its
#: slope statistic still runs): about the step's cost outside the split GLR
NO_DETECTOR = {"detectors": {**ALL_OFF["detectors"], "change_detector": "charts"},
               "rules": ALL_OFF["rules"]}


def _cpu_rate(pipe, p, ts, S) -> float:
    """Observations per CPU-second of one pipeline pass (a warm-up pass first)."""
    import time as _t

    m = min(p.n, 5000)
    pipe.run(p.sid[:m] % 5, p.X[:m], p.y[:m], n_series=5, ts=ts[:m])
    st = pipe.new_states(S)
    c = _t.process_time()
    pipe.run(p.sid, p.X, p.y, n_series=S, states=st, ts=ts)
    return p.n / max(_t.process_time() - c, 1e-9)


def _feedback_views():
    """The price-feedback loop as it was before 5 December: a view of the series' state, of
    the output row and of seven work-space parts made on every row, under numba's reference
    counting (the step itself is the current one: the arithmetic did not change)."""
    from numba import njit

    from monitor.estimators.feedback import feedback_step

    @njit(cache=False)
    def run(state, sid, lp, e, use, lam, t_on, t_off, min_neff, out, w):
        for j in range(lp.shape[0]):
            feedback_step(state[sid[j]], lp[j], e[j], use[j], lam, t_on, t_off, min_neff,
                          out[j], w)
    return run


def _feedback_rows(q, est, runs: int) -> list[Row]:
    """The price-feedback diagnostic (run after the compiled pipeline loop on every batch) on
    the rows of ``q``, per CPU-second, beside its previous loop; outputs compared to the bit."""
    from monitor.estimators import feedback as FB
    from monitor.estimators import kernel as K
    from monitor.estimators.batch import initial_states
    from monitor.estimators import run_batch

    out = run_batch(est, q.sid, q.X, q.y, states=initial_states(est, q.n_series)).out
    e = np.ascontiguousarray(out[:, K.O_E])
    use = (out[:, K.O_STATUS] != K.ST_WARMING_UP) & np.isfinite(e)
    lp = np.ascontiguousarray(q.X[:, 1])
    sid = np.ascontiguousarray(q.sid, dtype=np.int64)
    old = _feedback_views()

    def one(fn):
        st = np.zeros((q.n_series, FB.STATE_SIZE))
        res = np.empty((q.n, FB.FB_NOUT))
        c = time.process_time()
        fn(st, sid, lp, e, use, LAM, FB.DEFAULT_T_ON, FB.DEFAULT_T_OFF, FB.DEFAULT_MIN_N_EFF,
           res, np.empty(FB.WORK_SIZE))
        return time.process_time() - c, st, res

    one(FB.feedback_run)
    one(old)                                  # compile and warm both
    tn, to = [], []
    for _ in range(max(runs, 3)):
        a, st_n, res_n = one(FB.feedback_run)
        b, st_o, res_o = one(old)
        tn.append(a)
        to.append(b)
    same = (np.array_equal(st_n.view(np.int64), st_o.view(np.int64))
            and np.array_equal(res_n.view(np.int64), res_o.view(np.int64)))
    new = rate_row(f"price-feedback diagnostic (feedback_run, after the pipeline loop), "
                   f"{q.n_series:,} series x {q.n // q.n_series:,} steps, per CPU-second",
                   q.n, tn, target=None)
    new.target = "report"
    new.check = ("the Granger (1969) regression of each series' price move on its last demand "
                 "surprise, with its HC1 standard error, on every row; compiled without "
                 "reference counting, work-space parts made once per batch")
    ref = rate_row("the same step in its loop before 5 December (per-row views, reference "
                   "counting)", q.n, to, reference=True)
    ref.ratio = speed_ratio(new.value, ref.value)
    ref.check = (f"states and per-row outputs ({q.n:,} x {FB.FB_NOUT}) identical to the bit "
                 f"(compared as int64): {'agrees' if same else '**DIFFER**'}")
    return [new, ref]


def _z_streams(res, p, rows: np.ndarray) -> dict[int, np.ndarray]:
    from monitor.estimators import kernel as K

    z = res.out[rows, K.O_Z]
    sid = p.sid[rows]
    out = {}
    for s in np.unique(sid):
        v = z[sid == s]
        out[int(s)] = v[np.isfinite(v)]
    return out


def _river_ph(streams, threshold: float):
    from river.drift import PageHinkley

    dets = {s: PageHinkley(min_instances=30, delta=0.5, threshold=threshold, alpha=1.0,
                           mode="both") for s in streams}
    lists = {s: v.tolist() for s, v in streams.items()}
    alarms = {s: [] for s in streams}
    t0 = time.perf_counter()
    for s, vals in lists.items():
        d = dets[s]
        a = alarms[s]
        for i, x in enumerate(vals):
            d.update(x)
            if d.drift_detected:
                a.append(i)
    return time.perf_counter() - t0, alarms


def _elmon_ph(streams, threshold: float):
    from monitor.detectors import PageHinkley

    alarms = {s: [] for s in streams}
    t0 = time.perf_counter()
    for s, vals in streams.items():
        d = PageHinkley(delta=0.5, threshold=threshold, alpha=1.0, min_instances=30)
        a = alarms[s]
        for i, x in enumerate(vals.tolist()):
            if d.update(x).drift_detected:
                a.append(i)
    return time.perf_counter() - t0, alarms


def _river_adwin(streams):
    from river.drift import ADWIN

    dets = {s: ADWIN() for s in streams}
    lists = {s: v.tolist() for s, v in streams.items()}
    counts = {s: 0 for s in streams}
    t0 = time.perf_counter()
    for s, vals in lists.items():
        d = dets[s]
        for x in vals:
            d.update(x)
            if d.drift_detected:
                counts[s] += 1
    return time.perf_counter() - t0, counts


def _detection_summary(res, p) -> str:
    ev = res.events
    opened = ev[ev["action"] == "open"]
    step = p.step[opened["row"].to_numpy()]
    s = p.sid[opened["row"].to_numpy()]
    kinds = opened["kind"].to_numpy()
    ch = p.changed
    ec = kinds == "elasticity_change"
    hit = np.unique(s[ec & ch[s] & (step >= CHANGE_AT)])
    false = np.unique(s[ec & ~ch[s]])
    n_ch = int(ch.sum())
    by_kind = {k: int((kinds == k).sum()) for k in np.unique(kinds)}
    return (f"alerts opened {len(opened):,} ({', '.join(f'{k} {v:,}' for k, v in by_kind.items())}); "
            f"elasticity_change opened after the change in {hit.size:,} of {n_ch:,} changed "
            f"series, in {false.size:,} of {p.n_series - n_ch:,} unchanged ones (invented data)")


def run(ctx: Context) -> list[Row]:
    from monitor.estimators import ElasticityRLS, run_batch
    from monitor.pipeline.run import Pipeline

    S, T = ctx.size(10_000, 1_000), ctx.size(1_000, 800)
    p = panel(S, T, seed=7, change_every=EVERY, change_at=CHANGE_AT, change_by=CHANGE_BY)
    cfg = _config()
    est = ElasticityRLS(forgetting=LAM)
    pipe = Pipeline.from_config(cfg, est)
    ts = (np.datetime64("2024-01-01T00:00:00", "ns").astype(np.int64)
          + p.step * 3_600_000_000_000)
    m = min(p.n, 5000)
    pipe.run(p.sid[:m] % 5, p.X[:m], p.y[:m], n_series=5, ts=ts[:m])   # warm-up

    times, shares, res = [], [], None
    for _ in range(ctx.runs):
        states = pipe.new_states(S)
        t, res = timed(lambda: pipe.run(p.sid, p.X, p.y, n_series=S, states=states, ts=ts))
        times.append(t)
        shares.append(timed.cpu_share)
    main = rate_row(f"estimator + detectors + rules (Pipeline.run), {S:,} series x {T:,} steps",
                    p.n, times, target=15e6)
    # the estimator alone on the same rows, for the detectors' share of the time
    out = np.empty((p.n, 10))
    run_batch(est, p.sid[:m] % 5, p.X[:m], p.y[:m])        # warm-up: load the compiled kernel
    et = []
    for _ in range(ctx.runs):
        from monitor.estimators.batch import initial_states

        st = initial_states(est, S)
        t, _ = timed(lambda: run_batch(est, p.sid, p.X, p.y, states=st, out=out))
        et.append(t)
    est_rate = p.n / median(et)
    # where the step's time goes: the same step with every chart and rule off, on 1M rows
    q = panel(ctx.size(2_000, 500), 500, seed=9, change_every=EVERY, change_at=300,
              change_by=CHANGE_BY)
    qts = (np.datetime64("2024-01-01T00:00:00", "ns").astype(np.int64)
           + q.step * 3_600_000_000_000)
    on_rate = _cpu_rate(pipe, q, qts, q.n_series)
    off_rate = _cpu_rate(Pipeline.from_config(_config(**ALL_OFF), est), q, qts, q.n_series)
    bare_rate = _cpu_rate(Pipeline.from_config(_config(**NO_DETECTOR), est), q, qts, q.n_series)
    main.check = (f"{_detection_summary(res, p)}; the estimator alone on the same rows: "
                  f"{est_rate / 1e6:.1f}M obs/s; {share_note(shares, p.n, times)}; "
                  f"state row {pipe.state_size} floats; on {q.n:,} rows, per CPU-second: "
                  f"{on_rate / 1e6:.2f}M obs with the default detectors and rules, "
                  f"{off_rate / 1e6:.2f}M with every chart and rule switched off (the split "
                  f"GLR still on), {bare_rate / 1e6:.2f}M with the previous charts' family "
                  f"off in its place")
    rows = [main] + _feedback_rows(q, est, ctx.runs)

    sub = np.flatnonzero(p.sid < 20)
    streams = _z_streams(res, p, sub)
    nz = sum(v.size for v in streams.values())
    from monitor.detectors import PageHinkley as ElmonPH

    h = ElmonPH(delta=0.5).threshold
    rt, ra = [], None
    for _ in range(ctx.runs):
        t, ra = _river_ph(streams, h)
        rt.append(t)
    et_, ea = _elmon_ph(streams, h)
    same = all(ra[s] == ea[s] for s in streams)
    n_al = sum(len(v) for v in ra.values())
    ref = rate_row(f"river PageHinkley(delta=0.5, threshold={h:.2f}, mode='both') on z of the "
                   f"first 20 series ({nz:,} values)", nz, rt, reference=True)
    ref.ratio = speed_ratio(main.value, ref.value)
    ref.check = (f"elmon's streaming PageHinkley, same parameters and values: alarm indices "
                 f"{'identical' if same else '**DIFFER**'} ({n_al} alarms in river, "
                 f"{sum(len(v) for v in ea.values())} in elmon); elmon's streaming class "
                 f"{nz / et_ / 1e3:.0f}k values/s; the ratio compares elmon's whole pipeline "
                 f"with river's detector alone")
    rows.append(ref)

    at, counts = [], None
    for _ in range(ctx.runs):
        t, counts = _river_adwin(streams)
        at.append(t)
    ch = [s for s in streams if p.changed[s]]
    un = [s for s in streams if not p.changed[s]]
    ref = rate_row(f"river ADWIN() on the same {nz:,} values", nz, at, reference=True)
    ref.ratio = speed_ratio(main.value, ref.value)
    ref.check = (f"a different test, not expected to agree: {sum(counts[s] for s in ch)} alarms "
                 f"on the {len(ch)} changed series, {sum(counts[s] for s in un)} on the "
                 f"{len(un)} unchanged")
    rows.append(ref)
    return rows
