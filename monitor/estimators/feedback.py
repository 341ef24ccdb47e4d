"""Price feedback: does the price follow past demand surprises? (online, with forgetting)

When a manager raises the price after busy days and busy days come in runs, today's price
carries today's demand shock, and the log-log slope is biased (the simultaneity problem). The
diagnostic asks the Granger (1969) question of each series: do yesterday's demand surprises
help predict today's price move, beyond yesterday's price?

    dlp_t = a + h lp_{t-1} + g e_{t-1} + v_t          weights lam^(t-s)

with ``lp`` the log price, ``dlp_t = lp_t - lp_{t-1}`` and ``e_{t-1}`` the elasticity
estimator's one-step prediction error (log scale) on the previous row. The statistic is
``t = g / se(g)`` with the robust sandwich (HC1; White 1980, MacKinnon & White 1985), from the
same exact moment form as :mod:`monitor.estimators.iv_kernel`. Under randomized prices ``g = 0``.

Verdict: ``feedback`` once ``|t| >= t_on`` (default 4: a two-sided p of 6e-5 at one look, so
a year of daily looks rarely crosses it by chance) with ``n_eff >= min_n_eff`` (default 60:
the surprises' autocorrelation, which gives the direction below, is still noisy at 30 while
the estimator settles); back to ``none`` when ``|t| < t_off`` (2). ``warming_up`` before.

Direction of the likely bias of the least-squares elasticity: the bias is
``cov(lp_t, u_t) / var(lp)`` with ``u`` the demand shock, and through the feedback
``cov(lp_t, u_t) ~ g * cov(e_{t-1}, u_t)``, whose sign is that of the surprises' lag-1
autocorrelation ``r1`` (tracked with the same forgetting). ``g r1 > 0``: biased ``up`` (toward
zero or positive: demand looks less price-sensitive than it is); ``g r1 < 0``: ``down``;
``unclear`` while ``|r1| < 2 / sqrt(n_eff)`` (surprises that do not persist leave no bias
through this channel, but the feedback is still a warning).

>>> import numpy as np
>>> rng = np.random.default_rng(0)
>>> fb = PriceFeedback()
>>> u, lp = 0.0, np.log(4.0)
>>> for _ in range(300):
...     lp = np.log(4.0) + 0.3 * u + rng.normal(0, 0.02)   # price follows yesterday's shock
...     u = 0.8 * u + rng.normal(0, 0.1)
...     _ = fb.learn_one(lp, u)
>>> fb.verdict, fb.direction
('feedback', 'up')
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from monitor.estimators.iv_moments import chol, chol_inv, meat, packed_index

# state slots
(F_PREV_LP, F_PREV_E, F_HAVE_PREV, F_W, F_W2, F_N, F_VERDICT, F_EW, F_EE, F_EL, F_LL,
 F_WORK) = range(12)
#: g = (dlp, 1, lp_prev, e_prev): 4 entries, packed 10; z = x = g[1:]: 3 entries, packed 6
NG, NX, NX2 = 4, 3, 6
O_G = F_WORK
O_Q = O_G + NG * (NG + 1) // 2
STATE_SIZE = O_Q + (NG * (NG + 1) // 2) * NX2
WORK_SIZE = NG + NG * NG + 5 * NX * NX + NG

# output columns
FB_T, FB_COEF, FB_SE, FB_VERDICT, FB_DIRECTION, FB_R1, FB_NEFF = range(7)
FB_NOUT = 7
V_WARMING_UP, V_NONE, V_FEEDBACK = 0, 1, 2
VERDICTS = ("warming_up", "none", "feedback")
DIRECTIONS = {-1: "down", 0: "unclear", 1: "up"}

DEFAULT_T_ON = 4.0
DEFAULT_T_OFF = 2.0
DEFAULT_MIN_N_EFF = 60.0


@njit(cache=True)
def feedback_step(st, lp, e, use, lam, t_on, t_off, min_neff, out, w):
    """One row of one series: ``lp`` log price, ``e`` the elasticity estimator's innovation on
    this row, ``use`` False for rows whose innovation is not evidence (estimator warming up).

    The regression row is built from the previous usable row; writes ``out`` (FB_NOUT).
    ``w``: work space of :data:`WORK_SIZE` floats."""
    g, Gf, Sxx, L, Sinv, M, T, c = _work_views(w)
    _step(st, lp, e, use, lam, t_on, t_off, min_neff, out, g, Gf, Sxx, L, Sinv, M, T, c)


@njit(cache=True, inline="always")
def _work_views(w):
    """The work space's parts (made once per batch: views cost on every row)."""
    p0 = NG + NG * NG
    return (w[0:NG], w[NG:p0], w[p0:p0 + 9], w[p0 + 9:p0 + 18], w[p0 + 18:p0 + 27],
            w[p0 + 27:p0 + 36], w[p0 + 36:p0 + 45], w[p0 + 45:p0 + 45 + NG])


@njit(cache=True, inline="always")
def _step(st, lp, e, use, lam, t_on, t_off, min_neff, out, g, Gf, Sxx, L, Sinv, M, T, c):
    """:func:`feedback_step` with the work space's parts made by the caller."""
    have = st[F_HAVE_PREV] != 0.0
    if have:
        g[0] = lp - st[F_PREV_LP]
        g[1] = 1.0
        g[2] = st[F_PREV_LP]
        g[3] = st[F_PREV_E]
        l2 = lam * lam
        for a in range(NG):
            for b in range(a, NG):
                gab = g[a] * g[b]
                ia = packed_index(a, b, NG)
                st[O_G + ia] = lam * st[O_G + ia] + gab
                base = O_Q + ia * NX2
                for p in range(NX):
                    for q in range(p, NX):
                        st[base + packed_index(p, q, NX)] = (l2 * st[base + packed_index(p, q, NX)]
                                                             + gab * g[1 + p] * g[1 + q])
        st[F_W] = lam * st[F_W] + 1.0
        st[F_W2] = l2 * st[F_W2] + 1.0
        st[F_N] += 1.0
        if use:
            # lag-1 autocorrelation of the surprises (e_{t-1}, e_t), same forgetting
            st[F_EW] = lam * st[F_EW] + 1.0
            st[F_EE] = lam * st[F_EE] + e * st[F_PREV_E]
            st[F_EL] = lam * st[F_EL] + st[F_PREV_E] * st[F_PREV_E]
            st[F_LL] = lam * st[F_LL] + e * e
        _estimate(st, Gf, Sxx, L, Sinv, M, T, c, t_on, t_off, min_neff, out)
    else:
        out[FB_T] = np.nan
        out[FB_COEF] = np.nan
        out[FB_SE] = np.nan
        out[FB_R1] = np.nan
        out[FB_NEFF] = 0.0 if st[F_W2] == 0.0 else st[F_W] * st[F_W] / st[F_W2]
        out[FB_VERDICT] = st[F_VERDICT]
        out[FB_DIRECTION] = 0.0
    st[F_PREV_LP] = lp
    st[F_PREV_E] = e
    st[F_HAVE_PREV] = 1.0 if (use and e == e) else 0.0


@njit(cache=True, inline="always")
def _estimate(st, Gf, Sxx, L, Sinv, M, T, c, t_on, t_off, min_neff, out):
    W = st[F_W]
    neff = W * W / st[F_W2]
    out[FB_NEFF] = neff
    den = math.sqrt(st[F_EL] * st[F_LL])
    r1 = st[F_EE] / den if den > 0.0 else np.nan
    out[FB_R1] = r1
    for a in range(NG):
        for b in range(a, NG):
            v = st[O_G + packed_index(a, b, NG)]
            Gf[a * NG + b] = v
            Gf[b * NG + a] = v
    for p in range(NX):
        for q in range(NX):
            Sxx[p * NX + q] = Gf[(1 + p) * NG + 1 + q]
    tstat = np.nan
    coef = np.nan
    se = np.nan
    if chol(Sxx, L, NX):
        chol_inv(L, Sinv, NX)
        c[0] = 1.0
        for p in range(NX):
            acc = 0.0
            for q in range(NX):
                acc += Sinv[p * NX + q] * Gf[(1 + q) * NG]
            c[1 + p] = -acc
        coef = -c[3]
        meat(st, O_Q, c, NG, NX, NX2, M)
        # Var(gamma)_gg = (Sinv M Sinv)[2, 2], times the HC1 factor
        v = 0.0
        for p in range(NX):
            for q in range(NX):
                v += Sinv[2 * NX + p] * M[p * NX + q] * Sinv[q * NX + 2]
        if neff > NX and v > 0.0:
            se = math.sqrt(v * neff / (neff - NX))
            tstat = coef / se
    out[FB_T] = tstat
    out[FB_COEF] = coef
    out[FB_SE] = se
    verdict = st[F_VERDICT]
    if not (neff >= min_neff) or tstat != tstat:
        if verdict != V_FEEDBACK:
            verdict = V_WARMING_UP
    elif abs(tstat) >= t_on:
        verdict = V_FEEDBACK
    elif verdict != V_FEEDBACK or abs(tstat) < t_off:
        verdict = V_NONE
    st[F_VERDICT] = verdict
    out[FB_VERDICT] = verdict
    direction = 0.0
    if r1 == r1 and coef == coef and abs(r1) * math.sqrt(neff) >= 2.0:
        direction = 1.0 if coef * r1 > 0.0 else -1.0
    out[FB_DIRECTION] = direction


@njit(cache=True, _nrt=False)
def feedback_run(state, sid, lp, e, use, lam, t_on, t_off, min_neff, out, w):
    """:func:`feedback_step` over rows in order; row j belongs to series ``sid[j]``."""
    g, Gf, Sxx, L, Sinv, M, T, c = _work_views(w)
    for j in range(lp.shape[0]):
        _step(state[sid[j]], lp[j], e[j], use[j], lam, t_on, t_off, min_neff, out[j], g, Gf, Sxx,
              L, Sinv, M, T, c)


def init_state() -> np.ndarray:
    return np.zeros(STATE_SIZE)


def bias_text(direction: int) -> str:
    """Plain words for the direction code (+1 up, -1 down, 0 unclear)."""
    return {1: "biased toward zero (demand looks less price-sensitive than it is)",
            -1: "biased away from zero (demand looks more price-sensitive than it is)",
            0: "biased (direction unclear so far)"}[int(direction)]


def feedback_message(series: str, t: float, coef: float, direction: int) -> str:
    """The informational text of a ``price_feedback`` finding for one series."""
    return (f"{series}: prices follow demand. Yesterday's demand surprise predicts today's "
            f"price move (slope {coef:+.3f} log-price per log-unit surprise, t = {t:.1f}), so "
            f"the elasticity from these prices is likely {bias_text(direction)}. Randomize "
            "prices for a test period, or give an instrument (a cost, a tax, a randomized price "
            "assignment: --instrument NAME) so elmon estimates through it.")


def sign_flip_causes(verdict: int, direction: int) -> str:
    """Likely causes of a confidently positive elasticity, most likely first, given the
    series' price-feedback verdict (code) and bias direction on the alert's row."""
    data = "bad data (units, a broken price feed, a mislabelled series)"
    test = "a broken price test"
    if int(verdict) == V_FEEDBACK:
        lead = ("prices that follow demand (the price-feedback check fired: the estimate is "
                f"likely {bias_text(direction)}; give an instrument or randomize prices)")
        return f"likely causes, most likely first: 1. {lead}; 2. {data}; 3. {test}"
    return (f"likely causes, most likely first: 1. {data}; 2. {test}; 3. prices that follow "
            "demand (not detected by the price-feedback check so far)")


def verdict_events(out: np.ndarray, sid: np.ndarray, before: np.ndarray) -> list[tuple]:
    """Openings and clearings of the ``price_feedback`` finding from per-row outputs.

    ``out`` are :func:`run_feedback` rows, ``sid`` their series, ``before`` each series'
    verdict code before these rows. Returns ``(row, series index, action, t, coef, direction)``
    tuples in row order, action ``"open"`` when a series' verdict becomes ``feedback`` and
    ``"clear"`` when it leaves it.
    """
    v = out[:, FB_VERDICT]
    if len(v) == 0:                       # an empty batch opens and clears nothing
        return []
    if len(v) == 1:                       # one row (Monitor.observe): its series' verdict before
        p0, v0 = float(before[int(sid[0])]), float(v[0])
        if (v0 == V_FEEDBACK) == (p0 == V_FEEDBACK):
            return []
        return [(0, int(sid[0]), "open" if v0 == V_FEEDBACK else "clear", float(out[0, FB_T]),
                 float(out[0, FB_COEF]), int(out[0, FB_DIRECTION]))]
    prev = np.asarray(before, dtype=np.float64)[sid].copy()
    # previous verdict of each row within its series: shift by series
    order = np.argsort(sid, kind="stable")
    vs, ss = v[order], sid[order]
    shifted = np.r_[np.nan, vs[:-1]]
    first = np.r_[True, ss[1:] != ss[:-1]]
    shifted[first] = prev[order][first]
    p = np.empty_like(v)
    p[order] = shifted
    on = (v == V_FEEDBACK) & (p != V_FEEDBACK)
    off = (v != V_FEEDBACK) & (p == V_FEEDBACK)
    rows = np.flatnonzero(on | off)
    return [(int(j), int(sid[j]), "open" if on[j] else "clear", float(out[j, FB_T]),
             float(out[j, FB_COEF]), int(out[j, FB_DIRECTION])) for j in rows]


def pipeline_pass(fb_states: np.ndarray, sid: np.ndarray, log_price: np.ndarray,
                  out: np.ndarray, forgetting: float, instrumented: bool = False
                  ) -> tuple[np.ndarray, list[tuple]]:
    """The diagnostic over one batch of pipeline rows, after the compiled pipeline ran.

    ``fb_states`` are the series' feedback states (``(n_series, STATE_SIZE)``, updated in
    place, so batches chain and checkpoints carry them), ``out`` the estimator's output rows
    (innovation ``O_E``, status ``O_STATUS``, band ``O_BETA/O_LO/O_HI``). Returns the per-row
    outputs (columns ``FB_*``) and the ``price_feedback`` openings and clearings as
    ``(row, sid, action, t, coef, direction, beta, lo, hi, instrumented)``; ``instrumented``:
    the estimates go through instruments (the message then says so).
    """
    from monitor.estimators import kernel as K

    before = fb_states[:, F_VERDICT].copy()
    use = (out[:, K.O_STATUS] != K.ST_WARMING_UP) & np.isfinite(out[:, K.O_E])
    res = np.empty((len(sid), FB_NOUT))
    feedback_run(fb_states, np.ascontiguousarray(sid, dtype=np.int64),
                 np.ascontiguousarray(log_price, dtype=np.float64),
                 np.ascontiguousarray(out[:, K.O_E]), use, float(forgetting), DEFAULT_T_ON,
                 DEFAULT_T_OFF, DEFAULT_MIN_N_EFF, res, np.empty(WORK_SIZE))
    events = [ev + (float(out[ev[0], K.O_BETA]), float(out[ev[0], K.O_LO]),
                    float(out[ev[0], K.O_HI]), bool(instrumented))
              for ev in verdict_events(res, sid, before)]
    return res, events


def _num(v: float):
    return float(v) if math.isfinite(v) else None


def event_rows(events: list[tuple], names=None) -> list[dict]:
    """``price_feedback`` events (from :func:`pipeline_pass`) as rows of the alert events
    table (``row, sid, kind, action, severity, beta, beta_lo, beta_hi, message, details``);
    informational."""
    rows = []
    for j, s, action, t, coef, direction, b, lo, hi, instrumented in events:
        series = str(names[s]) if names is not None else f"series {s}"
        if action == "open" and instrumented:
            msg = (f"{series}: prices follow demand (yesterday's demand surprise predicts "
                   f"today's price move, t = {t:.1f}). The estimates here go through the "
                   "instruments, which removes that bias if the instruments move the price "
                   "and not demand; watch the first-stage F (weak_instrument below 10).")
        elif action == "open":
            msg = feedback_message(series, t, coef, direction)
        else:
            msg = (f"{series}: price feedback no longer detected (t = {t:.1f}); elasticity "
                   "estimates from these prices are less exposed to it now.")
        rows.append({"row": j, "sid": s, "kind": "price_feedback", "action": action,
                     "severity": "info", "beta": b, "beta_lo": lo, "beta_hi": hi,
                     "message": msg,
                     "details": {"t": _num(t), "coefficient": _num(coef),
                                 "bias_direction": DIRECTIONS[direction],
                                 "test": "log-price change on lagged demand surprise "
                                         "(Granger 1969)"}})
    return rows


def feedback_summary(alerts) -> dict:
    """summary.json block from the alerts table (``rule == "price_feedback"`` rows): the
    number of series flagged and, per flagged series, the first flag's time and message."""
    if alerts is None or not len(alerts):
        return {"series_flagged": 0, "series": {}}
    pf = alerts[alerts["rule"] == "price_feedback"].drop_duplicates("series", keep="first")
    return {"series_flagged": int(len(pf)),
            "series": {str(r.series): {"verdict": "feedback", "first_ts": str(r.ts),
                                       "message": str(r.message)} for r in pf.itertuples()}}


class PriceFeedback:
    """Streaming price-feedback diagnostic for one series (see the module docstring).

    Parameters
    ----------
    forgetting : float in (0, 1]
        Forgetting factor of the regression and of ``r1``.
    t_on, t_off : float
        The verdict turns to ``feedback`` at ``|t| >= t_on`` and back at ``|t| < t_off``.
    min_n_eff : float
        No verdict before this many effective rows.
    """

    def __init__(self, forgetting: float = 0.99, t_on: float = DEFAULT_T_ON,
                 t_off: float = DEFAULT_T_OFF, min_n_eff: float = DEFAULT_MIN_N_EFF):
        if not 0.0 < forgetting <= 1.0:
            raise ValueError(f"forgetting = {forgetting!r}: must be in (0, 1]")
        if not 0.0 < t_off <= t_on:
            raise ValueError(f"t_off = {t_off!r}, t_on = {t_on!r}: need 0 < t_off <= t_on")
        self.forgetting, self.t_on, self.t_off = float(forgetting), float(t_on), float(t_off)
        self.min_n_eff = float(min_n_eff)
        self._state = init_state()
        self._out = np.full(FB_NOUT, np.nan)
        self._out[FB_VERDICT] = V_WARMING_UP
        self._work = np.empty(WORK_SIZE)

    def learn_one(self, log_price: float, innovation: float, usable: bool = True
                  ) -> "PriceFeedback":
        feedback_step(self._state, float(log_price), float(innovation), bool(usable),
                      self.forgetting, self.t_on, self.t_off, self.min_n_eff, self._out,
                      self._work)
        return self

    @property
    def t(self) -> float:
        return float(self._out[FB_T])

    @property
    def coefficient(self) -> float:
        return float(self._out[FB_COEF])

    @property
    def verdict(self) -> str:
        return VERDICTS[int(self._out[FB_VERDICT])]

    @property
    def direction(self) -> str:
        return DIRECTIONS[int(self._out[FB_DIRECTION])]


@dataclass
class FeedbackResult:
    """Per-row outputs (columns ``FB_*``) and final states of :func:`run_feedback`."""

    out: np.ndarray
    states: np.ndarray

    def flagged(self, sid: np.ndarray) -> np.ndarray:
        """Per series: True when the verdict was ``feedback`` on any row."""
        n = self.states.shape[0]
        hit = np.zeros(n, dtype=bool)
        np.logical_or.at(hit, sid, self.out[:, FB_VERDICT] == V_FEEDBACK)
        return hit


def run_feedback(sid: np.ndarray, log_price: np.ndarray, innovation: np.ndarray,
                 usable: np.ndarray | None = None, forgetting: float = 0.99,
                 t_on: float = DEFAULT_T_ON, t_off: float = DEFAULT_T_OFF,
                 min_n_eff: float = DEFAULT_MIN_N_EFF,
                 states: np.ndarray | None = None) -> FeedbackResult:
    """Batch form: rows ``(sid, log p, innovation)`` in time order within each series."""
    sid = np.ascontiguousarray(sid, dtype=np.int64)
    lp = np.ascontiguousarray(log_price, dtype=np.float64)
    e = np.ascontiguousarray(innovation, dtype=np.float64)
    use = (np.isfinite(e) if usable is None
           else np.ascontiguousarray(usable, dtype=np.bool_) & np.isfinite(e))
    n_series = int(sid.max()) + 1 if sid.size else 0
    if states is None:
        states = np.zeros((n_series, STATE_SIZE))
    out = np.empty((lp.shape[0], FB_NOUT))
    feedback_run(states, sid, lp, e, use, float(forgetting), float(t_on), float(t_off),
                 float(min_n_eff), out, np.empty(WORK_SIZE))
    return FeedbackResult(out=out, states=states)
