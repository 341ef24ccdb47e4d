"""Instruments: throughput of the recursive IV step and of the price-feedback diagnostic.

Rows: the observational scenario (prices follow demand) with its ``unit_cost`` instrument,
2,000 series x 365 days (200 in ``--quick``), in arrival order. Figures:

- recursive 2SLS, 3 parameters (intercept, log price, weekend), 1 instrument (log cost), per row
  the estimate, HC1 band, effective first-stage F and status; forgetting 0.99;
- the same with 2 instruments (log cost and its lag, an over-identified first stage);
- least squares (:func:`monitor.estimators.run_batch`, same rows) for the cost of instruments;
- the price-feedback diagnostic over the least-squares innovations;
- reference: linearmodels ``IV2SLS`` fitted once per series on its whole history (it gives one
  estimate per series, elmon one per row); the check compares the final estimates of the
  first series at forgetting 1 (1e-8).

The hook for ``make bench`` is :func:`run` (group name ``iv``).
"""

from __future__ import annotations

import numpy as np

from benchmarks.common import Context, Row, rate_row, share_note, speed_ratio, timed


def _data(n_series: int):
    from simulators import observational

    sim = observational(seed=3, n_series=n_series, change_size=0.0)
    log = sim.log
    sid = log["series"].astype("category").cat.codes.to_numpy().astype(np.int64)
    lc = np.log(log["unit_cost"].to_numpy(float))
    lag = np.empty_like(lc)
    # previous day's cost of the same series (first day: its own)
    order = np.argsort(sid, kind="stable")
    s_sorted = lc[order]
    prev = np.r_[s_sorted[0], s_sorted[:-1]]
    first = np.r_[True, sid[order][1:] != sid[order][:-1]]
    prev[first] = s_sorted[first]
    lag[order] = prev
    R = np.column_stack([np.ones(len(log)), np.log(log["price"]), log["weekend"], lc, lag])
    y = np.log(log["quantity"].to_numpy(float))
    return sid, R, y, log


def _times(fn, runs):
    times, shares, res = [], [], None
    for _ in range(runs):
        t, res = timed(fn)
        times.append(t)
        shares.append(timed.cpu_share)
    return times, shares, res


def run(ctx: Context) -> list[Row]:
    from monitor.estimators import kernel as K
    from monitor.estimators import run_batch
    from monitor.estimators.feedback import run_feedback
    from monitor.estimators.iv import ElasticityIV, run_iv

    n_series = 200 if ctx.quick else 2000
    sid, R, y, log = _data(n_series)
    n = len(y)
    rows: list[Row] = []
    iv1 = ElasticityIV(log_instruments=["cost"], controls=["weekend"], forgetting=0.99)
    iv2 = ElasticityIV(log_instruments=["cost", "cost_lag"], controls=["weekend"],
                       forgetting=0.99)
    run_iv(iv1, sid[:500], R[:500, :4], y[:500])     # load the compiled kernels
    run_iv(iv2, sid[:500], R[:500], y[:500])
    R1 = np.ascontiguousarray(R[:, :4])
    times, shares, res = _times(lambda: run_iv(iv1, sid, R1, y), ctx.runs)
    ok = res.status == K.ST_OK
    rows.append(rate_row(f"recursive IV, 3 parameters, 1 instrument, {n_series} series x 365",
                         n, times, check=f"{ok.mean():.0%} of rows ok; median effective F "
                         f"{np.nanmedian(res.first_stage_f[ok]):.0f}; "
                         + share_note(shares, n, times)))
    iv_rate = rows[-1].value
    times, shares, res2 = _times(lambda: run_iv(iv2, sid, R, y), ctx.runs)
    rows.append(rate_row(f"recursive IV, 3 parameters, 2 instruments, {n_series} series x 365",
                         n, times, check=share_note(shares, n, times)))
    from monitor.estimators import ElasticityRLS

    ls = ElasticityRLS(forgetting=0.99, controls=["weekend"])
    X = np.ascontiguousarray(R[:, :3])
    run_batch(ls, sid[:500], X[:500], y[:500])
    times, shares, lsres = _times(lambda: run_batch(ls, sid, X, y), ctx.runs)
    row = rate_row("least squares on the same rows (no instrument)", n, times,
                   reference=True, check=share_note(shares, n, times))
    row.ratio = f"IV {row.value / iv_rate:.1f}x slower than least squares" if iv_rate else ""
    rows.append(row)
    e = lsres.out[:, K.O_E]
    use = lsres.out[:, K.O_STATUS] != K.ST_WARMING_UP
    run_feedback(sid[:500], R[:500, 1], e[:500], use[:500])
    times, shares, fb = _times(lambda: run_feedback(sid, R[:, 1], e, use), ctx.runs)
    rows.append(rate_row("price-feedback diagnostic over the least-squares innovations", n,
                         times, check=f"{fb.flagged(sid).mean():.0%} of series flagged; "
                         + share_note(shares, n, times)))
    rows.append(_linearmodels_row(ctx, sid, R1, y, log, iv_rate))
    return rows


def _linearmodels_row(ctx: Context, sid, R1, y, log, iv_rate) -> Row:
    import pandas as pd
    from linearmodels.iv import IV2SLS

    from monitor.estimators import kernel as K
    from monitor.estimators.iv import ElasticityIV, run_iv

    n_ref = 50 if ctx.quick else 200
    sel = sid < n_ref
    s, Rr, yr = sid[sel], R1[sel], y[sel]

    def fit_all():
        out = []
        for j in range(n_ref):
            m = s == j
            exog = pd.DataFrame({"const": 1.0, "weekend": Rr[m, 2]})
            out.append(IV2SLS(yr[m], exog, Rr[m, 1], Rr[m, 3]).fit(cov_type="robust",
                                                                   debiased=True))
        return out

    t, fits = timed(fit_all)
    ref = Row(f"linearmodels IV2SLS, one fit per series ({n_ref} series, whole history)",
              s.size / t, "obs/s", [s.size / t], reference=True)
    ref.ratio = speed_ratio(iv_rate, ref.value)
    one = run_iv(ElasticityIV(log_instruments=["cost"], controls=["weekend"], forgetting=1.0),
                 s[s == 0], Rr[s == 0], yr[s == 0])
    got = one.out[-1, K.O_BETA]
    want = float(fits[0].params.iloc[-1])
    diff = abs(got - want) / abs(want)
    ref.check = (f"series 0 at forgetting 1: b {got:.6f} vs {want:.6f} (rel. diff {diff:.1e}; "
                 f"{'equal to 1e-8' if diff < 1e-8 else 'DIFFERS'}); elmon gives an estimate "
                 "per row, linearmodels one per fit")
    return ref
