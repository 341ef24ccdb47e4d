"""The estimator kernel: elmon's compiled RLS step against four references on the same rows.

Figures (targets from issue 8, for a 2-core machine of this class, one core used: the kernel
is a single-threaded numba loop):

- 2 parameters (intercept, log price), 10k series x 1k steps in arrival order: >= 30M obs/s;
- one series of 10M steps: >= 20M obs/s;
- 4 controls (6 parameters), 10k series x 500 steps: reported.

elmon is timed through its public batch path :func:`monitor.estimators.run_batch` with the
default settings (forgetting 0.995 here, excitation guard on), states fresh for each run and the
output array allocated once outside the clock. It computes, per observation, the coefficients,
the sandwich standard error, the t interval, n_eff, the status and the standardized innovation;
the references compute less (coefficients and covariance only).

Equivalence checks (what is compared is said in each row):

- the plain Python loop against elmon's own timed output: the path of b, to 1e-10;
- statsmodels RecursiveLS (lambda = 1, diffuse start) against elmon with forgetting 1: the final
  coefficient vectors; elmon's weak proper prior N(0, 1000^2) moves them by about
  (prior precision 1e-6) x Var(theta) x |theta|, far below the 1e-6 tolerance used;
- river's BayesianLinearRegression with the matched prior (see :mod:`benchmarks.references`)
  against elmon with the excitation guard off: the path of the posterior mean of b;
- river's LinearRegression is SGD, a different estimator: its final b is shown beside the truth.
"""

from __future__ import annotations

import numpy as np

from benchmarks import references as R
from benchmarks.common import Context, Row, rate_row, share_note, speed_ratio, timed
from benchmarks.data import panel

LAM = 0.995                 # forgetting factor and river's smoothing (effective window ~400)


def _est(**kw):
    from monitor.estimators import ElasticityRLS

    return ElasticityRLS(forgetting=kw.pop("forgetting", LAM), **kw)


def elmon_times(est, p, runs: int):
    """Times of ``runs`` full passes of ``run_batch`` over panel ``p``, and the last result."""
    from monitor.estimators import run_batch
    from monitor.estimators import kernel as K
    from monitor.estimators.batch import initial_states

    out = np.empty((p.n, K.NOUT))
    m = min(p.n, 2000)   # warm-up: load the compiled kernel from numba's cache
    run_batch(est, p.sid[:m], p.X[:m], p.y[:m])
    times, res, shares = [], None, []
    for _ in range(runs):
        states = initial_states(est, p.n_series)
        t, res = timed(lambda: run_batch(est, p.sid, p.X, p.y, states=states, out=out))
        times.append(t)
        shares.append(timed.cpu_share)
    elmon_times.shares = shares
    return times, res


def _agree(diff: float, tol: float) -> str:
    return "agrees" if diff <= tol else "**DIFFERS**"


#: the references start from N(0, 1e6 I) (they need a proper start); elmon starts exactly
#: diffuse, so paths differ by the prior's pull, about 1e-6 x Var(theta_t) x |theta| / 1e6
REF_PRIOR_VAR = 1e6


def _prior_var(est) -> list[float]:
    return [REF_PRIOR_VAR] * est.row_width


def _refs(ctx: Context, p, rows: np.ndarray, est, elmon_rate: float, res, what: str,
          blr: bool = True) -> list[Row]:
    """Reference rows for the rows ``rows`` of panel ``p`` (a prefix of the same data)."""
    from monitor.estimators import run_batch
    from monitor.estimators import kernel as K

    sid, X, y = p.sid[rows], p.X[rows], p.y[rows]
    series = np.unique(sid)
    sid = np.unique(sid, return_inverse=True)[1].astype(np.int64)
    elmon_out = res.out
    paused = int(res.states[series, K.I_NPAUSED].sum())
    n = rows.size
    out = []
    on = f"on {what} ({n:,} obs, identical rows)"

    # plain Python loop, checked against elmon's own timed output
    _, path = R.plain_loop(sid, X, y, LAM, _prior_var(est), path=True)
    times = [R.plain_loop(sid, X, y, LAM, _prior_var(est))[0] for _ in range(ctx.runs)]
    if paused == 0:   # the guard never acted: elmon's timed output is plain RLS
        eb, note = elmon_out[rows, K.O_BETA], " (elmon's timed output; its guard never paused)"
    else:
        eb = run_batch(_est(excitation_guard=False, controls=est.controls), sid, X, y).beta
        note = f" (elmon with the guard off: it paused {paused} times in the timed run)"
    d = float(np.max(np.abs(path - eb)))
    row = rate_row(f"plain Python RLS loop {on}", n, times, reference=True)
    row.ratio = speed_ratio(elmon_rate, row.value)
    late = np.ones(n, dtype=bool)
    seen: dict[int, int] = {}
    for j, s in enumerate(sid.tolist()):
        late[j] = seen.get(s, 0) >= 50
        seen[s] = seen.get(s, 0) + 1
    d = float(np.max(np.abs(path - eb)[late]))
    row.check = (f"path of b from each series' 50th step, max abs diff vs elmon = {d:.1e} "
                 f"(tolerance 1e-4: the loop starts from N(0, 1e6), elmon exactly diffuse; "
                 f"that prior pulls b by ~1e-6 x |a| x |P_ab|, up to 3e-5 here)"
                 f": {_agree(d, 1e-4)}{note}")
    out.append(row)

    if X.shape[1] == 2:
        # a bare compiled update (theta and P only) on the whole of elmon's rows: the floor
        bt = [R.bare_compiled(p.sid, p.X, p.y, LAM, _prior_var(est))[0] for _ in range(ctx.runs)]
        _, bpath = R.bare_compiled(sid, X, y, LAM, _prior_var(est))
        eg = run_batch(_est(excitation_guard=False), sid, X, y).beta
        d = float(np.max(np.abs(bpath - eg)[late]))
        row = rate_row(f"bare compiled RLS update, theta and P only (numba, "
                       f"benchmarks/references.py) on all {p.n:,} rows", p.n, bt, reference=True)
        row.ratio = speed_ratio(elmon_rate, row.value)
        row.check = (f"the floor of any RLS kernel here (no variance, interval, n_eff, status or "
                     f"output row); path of b vs elmon (guard off) on the {n:,} reference rows: "
                     f"max abs diff {d:.1e} from each series' 50th step (tolerance 1e-4: the "
                     f"floor starts from N(0, 1e6), elmon exactly diffuse): {_agree(d, 1e-4)}")
        out.append(row)

    # statsmodels RecursiveLS (filter only), lambda = 1 on both sides for the check
    times = [R.recursive_ls(sid, X, y)[0] for _ in range(ctx.runs)]
    _, raw = R.recursive_ls(sid, X, y)
    _, withprior = R.recursive_ls(sid, X, y, prior_var=_prior_var(est))
    e1 = _est(forgetting=1.0, controls=est.controls)
    r1 = run_batch(e1, sid, X, y)
    k = X.shape[1]
    theta = r1.states[:, K.NS:K.NS + k]
    d_final = max(float(np.max(np.abs(theta[s] - withprior[s][:, -1]))) for s in withprior)
    d_raw = max(float(np.max(np.abs(theta[s] - raw[s][:, -1]))) for s in raw)
    d_path = max(float(np.nanmax(np.abs(r1.beta[sid == s] - withprior[s][1])))
                 for s in withprior)
    row = rate_row(f"statsmodels RecursiveLS, filter only {on}", n, times, reference=True)
    row.ratio = speed_ratio(elmon_rate, row.value)
    gaps = {s: np.abs(r1.beta[sid == s][k:] - raw[s][1][k:]) for s in raw}
    d_rawpath = max(float(np.nanmax(g)) for g in gaps.values())
    agree = _agree(max(d_raw, d_rawpath), 1e-8)
    arbiter = ""
    if max(d_raw, d_rawpath) > 1e-8:
        # the largest gaps, refereed by ordinary least squares on the same rows (numpy
        # lstsq): a Kalman-form recursion loses digits after two nearly equal early prices
        # and carries them on; the information form solves afresh at each step
        s0 = max(gaps, key=lambda s: np.nanmax(gaps[s]))
        i0 = k + int(np.nanargmax(gaps[s0]))
        s1 = max(raw, key=lambda s: np.max(np.abs(theta[s] - raw[s][:, -1])))
        m0 = np.flatnonzero(sid == s0)[:i0 + 1]
        m1 = np.flatnonzero(sid == s1)
        b0 = float(np.linalg.lstsq(X[m0], y[m0], rcond=None)[0][1])
        c1 = np.linalg.lstsq(X[m1], y[m1], rcond=None)[0]
        e_err = max(abs(float(r1.beta[m0[-1]]) - b0), float(np.max(np.abs(theta[s1] - c1))))
        s_err = max(abs(float(raw[s0][1][i0]) - b0), float(np.max(np.abs(raw[s1][:, -1] - c1))))
        arbiter = (f"; against ordinary least squares on the same rows (numpy lstsq) at the "
                   f"largest gaps (b of series {s0} at step {i0}, final coefficients of series "
                   f"{s1}): elmon {e_err:.1e}, RecursiveLS {s_err:.1e}")
        if e_err <= 1e-10:
            agree = "the gap is RecursiveLS's rounding: elmon equals OLS, agrees"
    row.check = (f"elmon forgetting=1 vs RecursiveLS, both exactly diffuse: final coefficients "
                 f"of {len(raw)} series max abs diff {d_raw:.1e}, path of b from step {k} "
                 f"{d_rawpath:.1e} (tolerance 1e-8): {agree}{arbiter}; "
                 f"RecursiveLS given a N(0, 1e6 I) prior differs from elmon by {d_final:.1e} "
                 f"(final) and {d_path:.1e} (path), that prior's pull")
    out.append(row)

    if not blr:
        return out
    # river BayesianLinearRegression, smoothing = lambda, constant feature
    times = []
    for _ in range(ctx.runs):
        t, _ = R.river_blr(sid, X, y, smoothing=LAM)
        times.append(t)
    row = rate_row(f"river BayesianLinearRegression(smoothing={LAM}) {on}", n, times,
                   reference=True)
    row.ratio = speed_ratio(elmon_rate, row.value)
    m = min(n, ctx.size(20_000, 5_000))
    pv = REF_PRIOR_VAR
    _, bpath = R.river_blr(sid[:m], X[:m], y[:m], smoothing=LAM,
                           alpha=R.blr_matched_alpha(pv, LAM), path=True)
    eg = _est(excitation_guard=False)
    epath = run_batch(eg, sid[:m], X[:m], y[:m]).beta
    step = np.zeros(m, dtype=np.int64)
    seen: dict[int, int] = {}
    for j, s in enumerate(sid[:m].tolist()):
        step[j] = seen.get(s, 0)
        seen[s] = step[j] + 1
    late = step >= 50
    d_all = float(np.nanmax(np.abs(bpath - epath)))
    d_late = float(np.nanmax(np.abs(bpath[late] - epath[late])))
    row.check = (f"posterior mean of b (river, alpha = 1000^2/(1-s) so its prior equals elmon's) vs "
                 f"elmon's b (exactly diffuse), guard off, first {m:,} rows: max abs diff "
                 f"{d_late:.1e} from each series' 50th step on ({d_all:.1e} including the first "
                 f"steps) (tolerance 1e-3: river's N(0, 1e6) prior pulls b, most in the first "
                 f"steps): {_agree(d_late, 1e-3)}")
    out.append(row)

    # river LinearRegression (SGD)
    times, w = [], None
    for _ in range(ctx.runs):
        t, w = R.river_sgd(sid, X, y)
        times.append(t)
    row = rate_row(f"river LinearRegression (SGD) {on}", n, times, reference=True)
    row.ratio = speed_ratio(elmon_rate, row.value)
    s0 = int(sid[0])
    truth = p.beta[int(p.sid[rows][0])]
    eb = elmon_out[rows, K.O_BETA][np.flatnonzero(sid == s0)[-1]]
    row.check = (f"a different estimator (SGD, lr 0.01): final b of the first series "
                 f"{w[s0]:.3f} vs elmon {eb:.3f}, true {truth:.3f}; not expected to agree")
    out.append(row)
    return out


def _blr_nan_row(ctx: Context, p) -> Row:
    first, done, secs, what = R.river_blr_first_nan(
        p.X, p.y, LAM, max_updates=ctx.size(1_000_000, 200_000), max_seconds=60.0)
    if first is None:
        return Row(f"river BayesianLinearRegression(smoothing={LAM}): updates until NaN", None,
                   reference=True,
                   check=f"no NaN in {done:,} updates ({secs:.0f} s, stopped: {what})")
    return Row(f"river BayesianLinearRegression(smoothing={LAM}): updates until its "
               f"prediction is NaN", float(first), "updates", reference=True,
               ratio="elmon: finite through all 10M steps",
               check=(f"first non-finite prediction at update {first:,} ({what}); river keeps >= 8 "
                      f"feature slots and the unused slots' prior precision s^N underflows "
                      f"near N = 141,500 for s = {LAM}"))


def run(ctx: Context) -> list[Row]:
    rows: list[Row] = []

    # ---- 2 parameters, 10k series x 1k steps
    S, T = ctx.size(10_000, 1_000), ctx.size(1_000, 200)
    p = panel(S, T, seed=1)
    est = _est()
    times, res = elmon_times(est, p, ctx.runs)
    main = rate_row(f"estimator kernel, 2 parameters, {S:,} series x {T:,} steps, one core",
                    p.n, times, target=30e6)
    finite = bool(np.isfinite(res.beta[-S:]).all())
    main.check = (f"RLS with forgetting {LAM}, default settings; all final b finite: {finite}; "
                  f"{share_note(elmon_times.shares, p.n, times)}")
    rows.append(main)
    sub = np.flatnonzero(p.sid < ctx.size(20, 5))
    rows += _refs(ctx, p, sub, est, main.value, res,
                  f"the first {ctx.size(20, 5)} series")
    del p, res

    # ---- one series, 10M steps
    N = ctx.size(10_000_000, 1_000_000)
    p = panel(1, N, seed=2)
    times, res = elmon_times(est, p, ctx.runs)
    main = rate_row(f"estimator kernel, 2 parameters, one series of {N:,} steps", N, times,
                    target=20e6)
    main.check = f"final b {res.beta[-1]:.4f}, true {p.beta[0]:.4f}; finite throughout: " \
                 f"{bool(np.isfinite(res.beta[10:]).all())}; {share_note(elmon_times.shares, p.n, times)}"
    rows.append(main)
    first = np.arange(ctx.size(100_000, 20_000))
    rows += _refs(ctx, p, first, est, main.value, res,
                  f"its first {first.size:,} steps")
    rows.append(_blr_nan_row(ctx, p))
    del p, res

    # ---- 4 controls (6 parameters)
    S, T = ctx.size(10_000, 1_000), ctx.size(500, 100)
    p = panel(S, T, controls=4, seed=3)
    est6 = _est(controls=("promo", "weekend", "temperature", "competitor_lp"))
    times, res = elmon_times(est6, p, ctx.runs)
    main = rate_row(f"estimator kernel, 4 controls (6 parameters), {S:,} series x {T:,} steps",
                    p.n, times)
    main.target = "report"
    main.check = ("general-k step (loops over k); promo, weekend, temperature, competitor log "
                  f"price; {share_note(elmon_times.shares, p.n, times)}")
    rows.append(main)
    rows.append(_previous_general_row(ctx, p, est6, main.value, res))
    sub = np.flatnonzero(p.sid < ctx.size(20, 5))
    rows += _refs(ctx, p, sub, est6, main.value, res,
                  f"the first {ctx.size(20, 5)} series", blr=False)
    del p, res

    # ---- band kinds and the Poisson model beside the log-log model (issue 13)
    S, T = ctx.size(10_000, 1_000), ctx.size(1_000, 200)
    p = panel(S, T, seed=1)
    for band in ("classic", "hac"):
        times, res = elmon_times(_est(band=band), p, ctx.runs)
        r = rate_row(f"estimator kernel, 2 parameters, band {band}, {S:,} series x {T:,} "
                     f"steps", p.n, times)
        r.target = "report"
        r.check = (f"beside the default hc band above; state "
                   f"{_est(band=band).state_size * 8} bytes per series (hc: "
                   f"{_est().state_size * 8}); {share_note(elmon_times.shares, p.n, times)}")
        rows.append(r)
    rows.append(_poisson_row(ctx, p))
    for r in rows:
        r.group = "estimator"
    return rows
def _previous_general_row(ctx: Context, p, est, elmon_rate: float, res) -> Row:
    """The general step as it was before issue 15's third round (kept verbatim in
    benchmarks/estimator_previous_general.py) on the same rows, its outputs and states
    compared with elmon's timed run as integers."""
    from monitor.estimators import kernel as K
    from benchmarks.estimator_previous_general import previous_rls_run_general

    k = p.X.shape[1]
    band, lags, lam, guard, guard_lam, mps, mneff, tq = est.kernel_args
    out = np.empty((p.n, K.NOUT))
    w = np.empty(k * k + 8 * k)
    m = min(p.n, 2000)
    previous_rls_run_general(np.tile(est.initial_state(), (p.n_series, 1)), p.sid[:m], p.X[:m],
                             p.y[:m], band, lags, lam, guard, guard_lam, mps, mneff, tq, out[:m],
                             w)
    times, shares, states = [], [], None
    for _ in range(ctx.runs):
        states = np.tile(est.initial_state(), (p.n_series, 1))
        t, _ = timed(lambda: previous_rls_run_general(states, p.sid, p.X, p.y, band, lags, lam,
                                                      guard, guard_lam, mps, mneff, tq, out, w))
        times.append(t)
        shares.append(timed.cpu_share)
    same = (np.array_equal(out.view(np.int64), res.out.view(np.int64))
            and np.array_equal(states.view(np.int64), res.states.view(np.int64)))
    row = rate_row("the general step before issue 15's third round "
                   "(benchmarks/estimator_previous_general.py), same rows", p.n, times,
                   reference=True)
    row.ratio = speed_ratio(elmon_rate, row.value)
    row.check = (f"outputs and states identical to elmon's timed run, compared as integers: "
                 f"{'agrees' if same else '**DIFFERS**'}; {share_note(shares, p.n, times)}")
    return row


def _poisson_row(ctx: Context, p) -> Row:
    """Poisson pseudo-ML filter on counts drawn around the panel's log-log means."""
    from monitor.estimators import ElasticityPoisson, poisson_fit, run_batch
    from monitor.estimators import kernel as K

    rng = np.random.default_rng(5)
    mean = np.exp(p.y - np.log(np.exp(p.y).mean()) + np.log(2.0))   # mean 2 counts
    q = rng.poisson(mean).astype(float)
    est = ElasticityPoisson(forgetting=LAM)
    out = np.empty((p.n, K.NOUT))
    m = min(p.n, 2000)
    run_batch(est, p.sid[:m], p.X[:m], q[:m])
    times, shares = [], []
    res = None
    for _ in range(ctx.runs):
        states = np.tile(est.initial_state(), (p.n_series, 1))
        t, res = timed(lambda: run_batch(est, p.sid, p.X, q, states=states, out=out))
        times.append(t)
        shares.append(timed.cpu_share)
    row = rate_row(f"Poisson pseudo-ML filter, 2 parameters, {p.n_series:,} series x "
                   f"{p.n // p.n_series:,} steps (counts, mean 2, "
                   f"{(q == 0).mean():.0%} zeros)", p.n, times)
    row.target = "report"
    s0 = np.flatnonzero(p.sid == 0)
    fit = poisson_fit(p.X[s0], q[s0], weights=LAM ** (s0.size - 1 - np.arange(s0.size)))
    d = abs(res.beta[s0[-1]] - fit.params[1]) / fit.bse_hc1[1]
    row.check = (f"beside the log-log kernel above (same rows); series 0: filter b "
                 f"{res.beta[s0[-1]]:.3f} vs the exact weighted MLE {fit.params[1]:.3f} "
                 f"({d:.2f} se apart), true {p.beta[0]:.3f}; state {est.state_size * 8} bytes "
                 f"per series; {share_note(shares, p.n, times)}")
    return row
