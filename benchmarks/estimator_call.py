"""How the estimator's compiled step is called and how lean it is (issue 15), each beside its
previous form.

- The batch loop :func:`monitor.estimators.kernel.rls_run` (what ``run_batch`` runs for the
  log-log model), 10,000 series x 1,000 steps in arrival order, default settings (hc band,
  forgetting 0.995, excitation guard on); it takes four different series' rows in one vector
  step (``step_two_lanes``). References: the same loop one row at a time (as it ran before
  the lane step: benchmarks/estimator_previous.py ``rows_rls_run_two``), the k = 2 step as
  it was before the second round (benchmarks/estimator_previous.py: the same loop, without
  reference counting, the scalar divisions one by one), and the loop as it was before issue
  15 (compiled here with reference counting, the model and form chosen per row). Outputs and
  final states compared to the bit. Target (issue 15): >= 30M obs per CPU-second.
- ``ElasticityRLS.learn_one`` called row by row from Python (price only). References: its
  previous form (the seven-argument ``rls_learn`` through numba's dispatcher, the log price
  written into the design row in numpy), and the call before issue 15, ``design_row`` +
  ``check_quantity`` + :func:`~monitor.estimators.kernel.rls_step` with its fifteen arguments.
  Final states compared to the bit. Target: >= 1M obs/s (per CPU-second of the process, like
  the loop above: on the shared machine wall time also counts the waits for a core).
"""

from __future__ import annotations

import math

import numpy as np

from benchmarks.common import Context, Row, median, rate_row, timed
from benchmarks.data import panel

LAM = 0.995


def _old_loop():
    """The batch loop as it was before issue 15 (reference counting on, dispatch per row)."""
    from numba import njit

    from monitor.estimators.dispatch import estimator_step

    def old(model, state, sid, X, y, off, band, lags, lam, guard, guard_lam, min_price_sd,
            min_neff, tq, out, w):
        k = X.shape[1]
        has_off = off.shape[0] > 0
        for j in range(X.shape[0]):
            o = off[j] if has_off else 0.0
            estimator_step(model, state[sid[j]], X[j], y[j], o, k, band, lags, lam, guard,
                           guard_lam, min_price_sd, min_neff, tq, out[j], w)
    return njit(cache=False)(old)


def _cpu(fn):
    """(wall seconds, process CPU seconds, result) of ``fn()`` alone: the CPU time is taken
    inside :func:`timed`, after its ``gc.collect()`` (timing around ``timed`` counted that full
    collection too: with the 200,000 row dicts of the learn_one figure alive it was as long as
    the 200,000 calls themselves)."""
    t, res = timed(fn)
    return t, timed.cpu_share * t, res


def _kernel_rows(ctx: Context) -> list[Row]:
    from benchmarks.estimator_previous import previous_rls_run_two, rows_rls_run_two
    from monitor.estimators import ElasticityRLS, run_batch
    from monitor.estimators import kernel as K
    from monitor.estimators.batch import initial_states
    from monitor.estimators.dispatch import work_size

    S, T = ctx.size(10_000, 1_000), ctx.size(1_000, 200)
    p = panel(S, T, seed=1)
    est = ElasticityRLS(forgetting=LAM)
    old = _old_loop()
    out_new = np.empty((p.n, K.NOUT))
    out_old = np.empty((p.n, K.NOUT))
    out_new.fill(0.0)          # touch the pages outside the clock
    out_old.fill(0.0)
    w = np.empty(work_size("loglinear", 2))
    m = 2000
    out_prev = np.empty((p.n, K.NOUT))
    out_prev.fill(0.0)
    out_rows = np.empty((p.n, K.NOUT))
    out_rows.fill(0.0)
    band, _, lam, guard, guard_lam, mps, mneff, tq = est.kernel_args
    run_batch(est, p.sid[:m], p.X[:m], p.y[:m])
    old(0, initial_states(est, S), p.sid[:m], p.X[:m], p.y[:m], np.empty(0), *est.kernel_args,
        out_old[:m], w)
    previous_rls_run_two(initial_states(est, S), p.sid[:m], p.X[:m], p.y[:m], band, lam, guard,
                         guard_lam, mps, mneff, tq, out_prev[:m])
    rows_rls_run_two(initial_states(est, S), p.sid[:m], p.X[:m], p.y[:m], band, lam, guard,
                     guard_lam, mps, mneff, tq, out_rows[:m])
    cpu_new, cpu_old, cpu_prev, st_new, st_old, st_prev = [], [], [], None, None, None
    cpu_rows, st_rows = [], None
    for _ in range(ctx.runs):
        st_new = initial_states(est, S)
        _, c, _ = _cpu(lambda: run_batch(est, p.sid, p.X, p.y, states=st_new, out=out_new))
        cpu_new.append(c)
        st_rows = initial_states(est, S)
        _, c, _ = _cpu(lambda: rows_rls_run_two(st_rows, p.sid, p.X, p.y, band, lam, guard,
                                                guard_lam, mps, mneff, tq, out_rows))
        cpu_rows.append(c)
        st_prev = initial_states(est, S)
        _, c, _ = _cpu(lambda: previous_rls_run_two(st_prev, p.sid, p.X, p.y, band, lam, guard,
                                                    guard_lam, mps, mneff, tq, out_prev))
        cpu_prev.append(c)
        st_old = initial_states(est, S)
        _, c, _ = _cpu(lambda: old(0, st_old, p.sid, p.X, p.y, np.empty(0), *est.kernel_args,
                                   out_old, w))
        cpu_old.append(c)
    same = (np.array_equal(out_new, out_old, equal_nan=True)
            and np.array_equal(st_new, st_old, equal_nan=True))
    same_prev = (np.array_equal(out_new.view(np.int64), out_prev.view(np.int64))
                 and np.array_equal(st_new.view(np.int64), st_prev.view(np.int64)))
    same_rows = (np.array_equal(out_new.view(np.int64), out_rows.view(np.int64))
                 and np.array_equal(st_new.view(np.int64), st_rows.view(np.int64)))
    main = rate_row(f"estimator batch loop (rls_run via run_batch), {S:,} series x {T:,} "
                    f"steps, per CPU-second", p.n, cpu_new, unit="obs/s", target=30e6)
    main.check = ("default settings (hc band, forgetting 0.995, guard on); rate per second of "
                  "process CPU time, so a busy machine's waiting is not counted")
    by_row = rate_row("the same loop one row at a time (before the four-series lane step; "
                      "benchmarks/estimator_previous.py rows_rls_run_two)", p.n, cpu_rows,
                      unit="obs/s")
    by_row.reference = True
    by_row.ratio = (f"elmon {main.value / by_row.value:.2f}x faster"
                    if main.value >= by_row.value
                    else f"elmon {by_row.value / main.value:.2f}x slower")
    by_row.check = (f"outputs ({p.n:,} x {K.NOUT}) and final states identical to the bit "
                    f"(compared as int64): {'agrees' if same_rows else '**DIFFERS**'}")
    prev = rate_row("the k = 2 step before the second round (benchmarks/estimator_previous.py), "
                    "same loop without reference counting", p.n, cpu_prev, unit="obs/s")
    prev.reference = True
    prev.ratio = (f"elmon {main.value / prev.value:.2f}x faster" if main.value >= prev.value
                  else f"elmon {prev.value / main.value:.2f}x slower")
    prev.check = (f"outputs ({p.n:,} x {K.NOUT}) and final states identical to the bit "
                  f"(compared as int64): {'agrees' if same_prev else '**DIFFERS**'}")
    ref = rate_row("the same loop compiled with reference counting, model and form chosen per "
                   "row (before issue 15)", p.n, cpu_old, unit="obs/s")
    ref.reference = True
    ref.ratio = (f"elmon {main.value / ref.value:.2f}x faster" if main.value >= ref.value
                 else f"elmon {ref.value / main.value:.2f}x slower")
    ref.check = (f"outputs ({p.n:,} x {K.NOUT}) and final states identical to the bit: "
                 f"{'agrees' if same else '**DIFFERS**'}")
    return [main, by_row, prev, ref]


def _learn_one_rows(ctx: Context) -> list[Row]:
    from monitor.estimators import ElasticityRLS
    from monitor.estimators import kernel as K
    from monitor.estimators.transform import check_quantity, design_row

    n = ctx.size(200_000, 20_000)
    rng = np.random.default_rng(18)
    prices = np.round(5.0 * np.exp(rng.normal(0, 0.1, n)), 2).tolist()
    qty = np.exp(3.0 - 1.8 * np.log(prices) + rng.normal(0, 0.2, n)).tolist()
    xs = [{"price": v} for v in prices]

    def new():
        est = ElasticityRLS(forgetting=0.99)
        learn = est.learn_one
        for x, q in zip(xs, qty):
            learn(x, q)
        return est

    def previous():
        # learn_one as it was before the second round: the dispatcher call, the row in numpy
        est = ElasticityRLS(forgetting=0.99)
        row, args, learn, log = est._learn_args[1], est._learn_args, K.rls_learn, math.log
        for x, q in zip(xs, qty):
            p = float(x["price"])
            qq = float(q)
            if not (0.0 < p < math.inf and 0.0 < qq < math.inf):
                raise ValueError("benchmark rows are valid")
            row[1] = log(p)
            learn(*args, log(qq))
        return est

    def old():
        est = ElasticityRLS(forgetting=0.99)
        for x, q in zip(xs, qty):
            row = design_row(x, est._specs)
            yq = check_quantity(q)
            K.rls_step(est._state, row, math.log(yq), est._k, *est.kernel_args, est._out,
                       est._work)
        return est

    e = ElasticityRLS(forgetting=0.99)      # compile or load outside the clock
    e.learn_one(xs[0], qty[0])
    K.rls_step(e._state, design_row(xs[0], e._specs), 1.0, e._k, *e.kernel_args, e._out,
               e._work)
    t_new, t_old, t_prev, a, b, c = [], [], [], None, None, None
    for _ in range(ctx.runs):
        _, t, a = _cpu(new)
        t_new.append(t)
        _, t, c = _cpu(previous)
        t_prev.append(t)
        _, t, b = _cpu(old)
        t_old.append(t)
    same = np.array_equal(a._state, b._state, equal_nan=True) and \
        np.array_equal(a._out, b._out, equal_nan=True)
    same_prev = np.array_equal(a._state.view(np.int64), c._state.view(np.int64)) and \
        np.array_equal(a._out.view(np.int64), c._out.view(np.int64))
    main = rate_row(f"ElasticityRLS.learn_one, {n:,} calls from Python (price only), per "
                    f"CPU-second", n, t_new, target=1e6)
    main.check = ("process CPU time of the loop (the shared machine's waiting not counted); "
                  "includes the checks of price and quantity; the step is called through its "
                  "compiled entry (rls.compiled_entry: no per-call type dispatch) with the log "
                  "price as a float argument")
    prev = rate_row("its previous form: rls_learn through numba's dispatcher, seven arguments, "
                    "the log price written into the design row in numpy", n, t_prev)
    prev.reference = True
    prev.ratio = f"elmon {main.value / prev.value:.2f}x faster"
    prev.check = (f"final state and output row identical to the bit: "
                  f"{'agrees' if same_prev else '**DIFFERS**'}")
    ref = rate_row("the previous call: design_row + check_quantity + rls_step with fifteen "
                   "arguments", n, t_old)
    ref.reference = True
    ref.ratio = f"elmon {main.value / ref.value:.1f}x faster"
    ref.check = (f"final state and output row identical to the bit: "
                 f"{'agrees' if same else '**DIFFERS**'}")
    return [main, prev, ref]


def run(ctx: Context) -> list[Row]:
    return _kernel_rows(ctx) + _learn_one_rows(ctx)
