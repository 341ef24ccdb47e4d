"""The no-truth check of the split likelihood-ratio detector: false alerts per 10,000
observations on in-control logs resampled from the log itself, against the design's 10,000 / ARL0.

``elmon tune LOG --arl0 A`` (no ``--truth``) with the default detector (``[detectors]
change_detector = "split_glr"``). The design (:mod:`monitor.detectors.split_design`) sets each
chart's threshold so that a series with independent normal errors of constant variance raises
one false alert of each kind (``elasticity_change``, ``level_shift``) per ``A`` observations.
This check asks whether the data at hand keep that promise.

1. Fit. The log runs once through the configured pipeline. Per series (at least
   :data:`MIN_ROWS` rows past warm-up): the innovations ``e_t`` (one-step prediction errors of
   the monitor's own estimator: a change in the log is followed within an effective window
   and so does not leave a step in them, as it would in a full-sample fit's residuals), the
   constant coefficients ``theta`` of a least-squares fit of ``log q`` on the series' design
   rows ``[1, log p, controls]``, and the price-linked variance ``Var e_t ~ exp(g x_t)``
   (:mod:`monitor.replay.health`; ``g`` is used where it is at least 3 standard errors from
   0 and taken as 0 otherwise, so that the noise of the estimate adds no pattern to series
   without one).
2. Resample. An in-control path of a series keeps its own prices and controls, in their own
   order (its price pattern: steps held for weeks, flat stretches, prices that move with a
   control): ``y*_t = x_t' theta + r*_t``. The errors are an autoregressive sieve bootstrap
   (Kreiss 1992; Bühlmann 1997) of the price-standardized innovations ``u_j = e_j exp(-g x_j
   / 2)``: an AR(p) fit (:func:`ar_sieve`, order by AIC) keeps their autocorrelation, its
   residuals drawn with replacement keep their tails, and ``r*_t = u*_t exp(g x_t / 2)`` puts
   back the link of their size to the path's price. No change happens inside a path.

   Why not a block bootstrap (Künsch 1989): the level chart's false-alarm rate hangs on the
   errors' variance over hundreds of observations, which the blocks take from a few dozen
   block means of the series itself. On six series of 1,000 independent errors the block
   bootstrap's level-alert ratio ranged 0.24 to 1.46 between logs of the same process (per
   series 0.07 to 3.2); the sieve's ranged 0.81 to 1.00. Against the pipeline run over the
   process itself (600 series x 2,000 observations, ARL0 2,000; slope / level ratios) the
   sieve check of one log of six series gave: independent errors 1.06 / 0.98 (process 1.00 /
   0.95), AR(1) 0.6 0.77 / 1.01 (0.73 / 1.10), AR(1) 0.9 0.47 / 2.01 (0.49 / 1.83), error sd
   growing with price 1.27 / 1.46 (1.31 / 1.54; log-price sd 0.2: 1.48 / 2.71 against 1.74 /
   2.92), prices held 7-28 observations 0.43 / 0.93 (0.49 / 1.00).
3. Count. Paths run through the same pipeline (thresholds, start rule, alert rules), in groups
   of about :data:`GROUP_ROWS` rows, until the budget of observations is spent (series drawn
   in a seeded random order, each path one whole series, long series cut to a random window
   of :func:`path_cap` rows). Every opened alert of each kind is a false alert. The rate per
   10,000 observations is compared with 10,000 / ``A``; its 95% interval is Garwood's (1936)
   exact Poisson interval widened by the paths' over-dispersion (Pearson chi-square over
   degrees of freedom, at least 1; quasi-Poisson, McCullagh & Nelder 1989), and widened again
   by the error of the sieve itself: one log fixes each series' AR fit, and under strongly
   autocorrelated errors the rate is steep in it. The budget is split into :data:`FIT_GROUPS`
   groups of paths, each with every series' sieve fitted again to a path of the series' own
   length drawn from the fitted sieve (:func:`refits`; a parametric bootstrap of the fit), and
   the groups' spread beyond their counts' own is the fit's variance (:func:`fit_variance`, by
   moments as in DerSimonian & Laird 1986, at least 0), added to the interval's half-width in
   quadrature; the ratio itself is then the mean over the refits, which also smooths the AR
   order that AIC picks for each series. Measured on six logs of six series x 2,000
   observations with AR(1) errors of 0.9 (ARL0 2,000, 400,000 resampled observations, seeds
   11-16, 5 December 2026; the pipeline's own level rate on the process 0.874, 500 series):
   with one fit the level ratio ranged 0.59 to 1.06 between the logs (mean 0.835) and two of
   the six intervals missed 0.874; with the refits 0.75 to 1.06 (mean 0.869) and all six held
   it. With eight groups the fit's variance is itself a rough estimate (a chi-square of 7
   degrees of freedom less the counts' part): on independent errors it widens an interval by
   chance now and then (a larger budget narrows both parts). Every observation of a path
   counts, its start included, as in replay's ``false_alarms_per_10k``; on short
   series (a year of daily data) the rows before the charts start lower the rate a little.
4. Reference. The same paths with independent normal errors of the series' innovation sd
   (what the design assumes, on the data's own prices): when the data's paths are over the
   design and the reference is not, the errors break it; when both are, the price pattern does.

Under the Poisson model (``[estimator] model = "poisson"``, issue 13) steps 1, 2 and 4 are
those of :mod:`monitor.tuning.count_check`: the paths are counts drawn from a Poisson
regression fitted to each series on its own prices, controls and exposures, negative binomial
where the counts are over-dispersed (Cameron & Trivedi 2013), and the reference draws Poisson
counts on the same means; the count, the interval and the verdicts are the same.

Verdict per kind (the band of issue 12: within +-25% of 10,000 / ARL0): ``breaks`` when the
interval's lower end is above 1.25 times the design; ``holds`` when the estimate is at most
1.25 times (``conservative`` beside it when the interval's upper end is below 0.75: fewer false
alerts than designed, so changes take longer to detect than they could); ``unsettled``
otherwise (over 1.25 times but within the interval's reach: a larger budget settles it).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from monitor.estimators import kernel as K
from monitor.progress import Progress
from monitor.replay.health import Z_LEVEL, health_of_arrays

KINDS = ("elasticity_change", "level_shift")
#: the in-control band of issue 12: within +-25% of 10,000 / ARL0
BAND = 0.25
#: rows past warm-up a series needs to be resampled
MIN_ROWS = 60
#: rows per pipeline call (paths of the data and of the reference together)
GROUP_ROWS = 400_000
#: default budget of resampled observations (data paths; the reference runs as many again)
DEFAULT_OBS = 2_000_000
#: groups of paths, each with its own refit of every series' sieve (the fit's error in the
#: interval; module docstring, step 3)
FIT_GROUPS = 8


def path_cap(budget: int) -> int:
    """Longest path, observations: a tenth of the budget, at least 5,000."""
    return int(max(5_000, budget // 10))


def ar_sieve(u: np.ndarray, p_max: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Autoregression of ``u`` for the sieve bootstrap: coefficients ``phi`` (order by AIC,
    0 to ``p_max = min(10, n // 50)``, Yule-Walker, so the fit is always stationary) and the
    centred residuals ``w_t = u_t - sum phi_i u_{t-i}``."""
    from scipy.linalg import solve_toeplitz

    x = u - u.mean()
    n = x.size
    p_max = min(10, n // 50) if p_max is None else p_max
    r = np.array([x[:n - k] @ x[k:] / n for k in range(p_max + 1)])
    best, phi_best = n * math.log(r[0]), np.zeros(0)
    for p in range(1, p_max + 1):
        phi = solve_toeplitz(r[:p], r[1:p + 1])
        s2 = r[0] - phi @ r[1:p + 1]
        if s2 <= 0:
            break
        aic = n * math.log(s2) + 2 * p
        if aic < best:
            best, phi_best = aic, phi
    w = x.copy()
    for i, c in enumerate(phi_best, start=1):
        w[i:] -= c * x[:-i]
    w = w[phi_best.size:]
    return phi_best, w - w.mean()


def sieve_path(phi: np.ndarray, w: np.ndarray, length: int, rng, burn: int = 200) -> np.ndarray:
    """An AR(p) path driven by residuals ``w`` drawn with replacement (Kreiss 1992;
    Bühlmann 1997), after ``burn`` steps."""
    from scipy.signal import lfilter

    e = w[rng.integers(0, w.size, length + burn)]
    if not phi.size:
        return e[burn:]
    return lfilter([1.0], np.r_[1.0, -phi], e)[burn:]


def series_models(rows, pipe, min_rows: int = MIN_ROWS) -> list[dict]:
    """Per usable series: ``name``, ``X`` (its design rows, all of them), ``theta``, the
    sieve's AR coefficients ``phi`` and residuals ``w`` (of the price-standardized innovations),
    the variance slope ``g`` used, the innovation sd ``sd`` and the health figures (:func:`monitor.replay.health.health_of_arrays`)."""
    n_series = len(rows.names)
    res = pipe.run(rows.sid, rows.X, rows.y, n_series=n_series, ts=rows.ts)
    e = res.out[:, K.O_E]
    usable = np.isfinite(e) & (res.out[:, K.O_STATUS] != K.ST_WARMING_UP)
    out = []
    for s, a, b, m in rows.usable_spans(usable, min_rows):
        X, y = rows.X[a:b], rows.y[a:b]
        theta = np.linalg.lstsq(X[m], y[m], rcond=None)[0]
        es, xs = e[a:b][m], X[m, 1]
        if not np.std(es) > 0:          # a series fitted exactly: no errors to resample
            continue
        h = health_of_arrays(es, xs)
        g_raw, g_se = h["var_price_slope"], h["var_price_slope_se"]
        g = g_raw if math.isfinite(g_raw) and abs(g_raw) >= Z_LEVEL * g_se else 0.0
        xbar = float(xs.mean())
        u = es * np.exp(-0.5 * g * (xs - xbar))
        phi, w = ar_sieve(u)
        out.append({"name": rows.names[s], "X": X, "theta": theta, "phi": phi, "w": w, "g": g,
                    "n_fit": int(u.size),
                    "xbar": xbar, "sd": float(np.std(es)), "health": h})
    return out


def refits(models: list[dict], groups: int, rng) -> list[list[tuple]]:
    """Per group, per series: the sieve ``(phi, w)`` fitted again to a path of the series' own
    length drawn from its fitted sieve (a parametric bootstrap of the fit: Bühlmann 1997), so
    that the groups differ by the error with which one log fixes its sieve."""
    return [[ar_sieve(sieve_path(m["phi"], m["w"], m["n_fit"], rng)) for m in models]
            for _ in range(groups)]


def fit_variance(counts: np.ndarray, exposure: np.ndarray, group: np.ndarray, arl0: float,
                 dispersion: float = 1.0) -> float:
    """Variance of the ratio that comes from the sieve's fit (module docstring, step 3): the
    spread of the groups' ratios less what their (quasi-)Poisson counts alone give it, by
    moments (DerSimonian & Laird 1986), at least 0."""
    G = int(group.max()) + 1 if group.size else 0
    if G < 2:
        return 0.0
    cg = np.bincount(group, weights=counts, minlength=G)
    Eg = np.bincount(group, weights=exposure, minlength=G)
    keep = Eg > 0
    cg, Eg = cg[keep], Eg[keep]
    if cg.size < 2 or cg.sum() == 0:
        return 0.0
    ratio_g = cg * arl0 / Eg
    ratio = cg.sum() * arl0 / Eg.sum()
    between = float(np.sum((ratio_g - ratio) ** 2)) / (cg.size - 1)
    poisson = float(np.mean(dispersion * ratio * arl0 / Eg))
    return max(0.0, between - poisson)


def alert_rates(counts: np.ndarray, exposure: np.ndarray, arl0: float,
                group: np.ndarray | None = None) -> dict:
    """Rate per 10,000 observations, ratio to the design and its 95% interval (see the module
    docstring, step 3) from per-path alert counts and path lengths; with ``group`` (each
    path's fit group) the interval holds the sieve fit's error as well."""
    from scipy.stats import chi2

    c, E = float(counts.sum()), float(exposure.sum())
    design = 1e4 / arl0
    rate = 1e4 * c / E
    phi = 1.0
    if c > 0 and counts.size > 1:
        mu = c * exposure / E
        phi = max(1.0, float(np.sum((counts - mu) ** 2 / mu)) / (counts.size - 1))
    ce, Ee = c / phi, E / phi
    lo = 0.0 if ce == 0 else chi2.ppf(0.025, 2 * ce) / 2
    hi = chi2.ppf(0.975, 2 * ce + 2) / 2
    per = Ee / arl0                  # alerts the design expects on the (deflated) exposure
    ratio, r_lo, r_hi = rate / design, lo / per, hi / per
    fit_sd = 0.0
    if group is not None and c > 0:
        fit_sd = math.sqrt(fit_variance(counts, exposure, group, arl0, phi))
        if fit_sd > 0:
            half = math.hypot((r_hi - r_lo) / 2.0, 1.959964 * fit_sd)
            r_lo, r_hi = min(r_lo, max(0.0, ratio - half)), max(r_hi, ratio + half)
    return {"alerts": int(c), "observations": int(E), "rate_per_10k": rate,
            "design_per_10k": design, "ratio": ratio, "ratio_lo": r_lo,
            "ratio_hi": r_hi, "dispersion": phi, "fit_sd": fit_sd}


def verdict(r: dict) -> str:
    """``breaks``, ``holds`` or ``unsettled`` (module docstring)."""
    if r["ratio_lo"] > 1 + BAND:
        return "breaks"
    if r["ratio"] <= 1 + BAND:
        return "holds"
    return "unsettled"


#: the words of the reference and of an error-caused break, per model
_WORDS = {
    "loglinear": ("the same paths with independent normal errors", "the errors cause it",
                  "the errors cause most of it"),
    "poisson": ("the same paths drawn as Poisson counts", "the counts' over-dispersion causes it",
                "the counts' over-dispersion causes most of it"),
}


def _log_errors_text(health: dict) -> str:
    return (f"({health['autocorrelated']} of {health['series']} series autocorrelated, "
            f"median lag-1 autocorrelation {health['median_resid_ac1']:.2f}; "
            f"{health['price_linked_variance']} with error variance linked to price)")


def _message(kind: str, d: dict, ref: dict, arl0: float, errors: str,
             model: str = "loglinear") -> str:
    what = kind
    ref_words, cause, most = _WORDS[model]
    v = d["verdict"]
    head = (f"{what}: {d['rate_per_10k']:.3g} false alerts per 10,000 observations on the "
            f"data's in-control paths against {d['design_per_10k']:.3g} designed "
            f"({d['ratio']:.2f} times, 95% interval {d['ratio_lo']:.2f}-{d['ratio_hi']:.2f}, "
            f"{d['alerts']} alerts)")
    if v == "holds":
        tail = "design holds"
        if d["ratio_hi"] < 1 - BAND:
            tail += (" (conservative: fewer false alerts than designed, so changes take longer "
                     "to detect than the design says)")
        return f"{head}: {tail}"
    if ref["ratio"] <= 1 + BAND:
        why = f"{cause} {errors}"
    elif d["ratio"] > (1 + BAND) * ref["ratio"]:
        # the price pattern alone is over the band, and the errors raise it well beyond that
        why = (f"{most} {errors}, on top of the price pattern (prices "
               "held for weeks, flat stretches, prices moving with a control)")
    else:
        why = ("the price pattern (prices held for weeks, flat stretches, prices moving with a "
               "control) takes the statistic out of its design")
    cause = f"{ref_words} give {ref['ratio']:.2f} times, so " + why
    if v == "unsettled":
        return (f"{head}: over the design but not settled by this budget; run the check with "
                f"more observations (--bootstrap-obs); {cause}")
    every = arl0 / d["ratio"]
    return (f"{head}: {d['ratio']:.1f} times the design: the data break it. Expect about "
            f"{d['ratio']:.1f} times the promised false {what} alerts, one per {every:,.0f} "
            f"observations of a series instead of one per {arl0:,.0f}, so each such alert is "
            f"weaker evidence than designed; {cause}. A larger --arl0 lowers the rate "
            f"(a first try: {arl0 * d['ratio']:,.0f}); run this check again with it")


def check_alert_rates(rows, config, arl0: float, *, n_obs: int | None = None, seed: int = 0,
                      progress: bool = True) -> dict:
    """Run the check (module docstring) of the configured pipeline on ``rows``
    (:class:`monitor.tuning.rows.Rows`); ``n_obs``: budget of resampled observations (data
    paths; default :data:`DEFAULT_OBS`). Returns the ``alert_rates`` block of calibration.json."""
    from monitor.pipeline.run import Pipeline
    from monitor.settings import estimator_from_config

    est = estimator_from_config(config)
    pipe = Pipeline.from_config(config, est)
    model = getattr(est, "model", "loglinear")
    counts_model = model == "poisson"
    if counts_model:                 # parametric count paths (monitor.tuning.count_check)
        from monitor.tuning.count_check import (count_errors_text, count_health, count_models,
                                                count_path)

        models = count_models(rows, pipe)
    else:
        models = series_models(rows, pipe)
    if not models:
        return {"checked": False, "reason": f"no series has {MIN_ROWS} observations past the "
                                            "estimator's warm-up to resample"}
    budget = int(n_obs or DEFAULT_OBS)
    cap = path_cap(budget)
    rng = np.random.default_rng([seed, 12])
    fits = None if counts_model else refits(models, FIT_GROUPS, rng)
    bar = Progress(budget, "tune check", enabled=bool(progress), unit="observations")
    counts = {w: {k: [] for k in KINDS} for w in ("data", "ref")}
    lengths, done, paths, groups = [], 0, 0, []
    order = []
    while done < budget:
        Xs, yd, yr, offs = [], [], [], []
        group = 0
        while group < GROUP_ROWS // 2 and done < budget:
            if not order:
                order = list(rng.permutation(len(models)))
            i = order.pop()
            m = models[i]
            grp = min(FIT_GROUPS - 1, done * FIT_GROUPS // budget)
            n = m["X"].shape[0]
            L = min(n, cap)
            a = int(rng.integers(0, n - L + 1))
            X = m["X"][a:a + L]
            Xs.append(X)
            if counts_model:
                mu = m["mu"][a:a + L]
                offs.append(m["offset"][a:a + L])
                yd.append(count_path(mu, m["alpha"], rng))
                yr.append(count_path(mu, 0.0, rng))
            else:
                fit = X @ m["theta"]
                us = sieve_path(*fits[grp][i], L, rng)
                yd.append(fit + us * np.exp(0.5 * m["g"] * (X[:, 1] - m["xbar"])))
                yr.append(fit + m["sd"] * rng.standard_normal(L))
            lengths.append(L)
            groups.append(grp)
            group += L
            done += L
        k = len(Xs)
        sid = np.repeat(np.arange(2 * k), [x.shape[0] for x in Xs] * 2)
        res = pipe.run(sid, np.concatenate(Xs + Xs), np.concatenate(yd + yr), n_series=2 * k,
                       offset=np.concatenate(offs + offs) if counts_model else None)
        ev = res.events
        ev = ev[(ev["action"] == "open") & ev["kind"].isin(KINDS)]
        for kind in KINDS:
            per = np.bincount(ev.loc[ev["kind"] == kind, "sid"].to_numpy(dtype=np.int64),
                              minlength=2 * k)
            counts["data"][kind].append(per[:k])
            counts["ref"][kind].append(per[k:])
        paths += k
        bar.update(rows=group, done=done)
    bar.close()
    exposure = np.asarray(lengths, dtype=float)
    gidx = None if counts_model else np.asarray(groups, dtype=np.int64)
    if counts_model:
        health = count_health(models)
        errors = count_errors_text(health)
    else:
        hs = [m["health"] for m in models]
        health = {"series": len(models),
                  "autocorrelated": sum("autocorrelated" in h["flags"] for h in hs),
                  "price_linked_variance": sum("price_linked_variance" in h["flags"] for h in hs),
                  "median_resid_ac1": float(np.nanmedian([h["resid_ac1"] for h in hs])),
                  "median_sd_ratio_per_price_sd": float(np.nanmedian(
                      [h["sd_ratio_per_price_sd"] for h in hs]))}
        errors = _log_errors_text(health)
    kinds = {}
    for kind in KINDS:
        d = alert_rates(np.concatenate(counts["data"][kind]), exposure, arl0, gidx)
        ref = alert_rates(np.concatenate(counts["ref"][kind]), exposure, arl0)
        d["verdict"] = verdict(d)
        d["flagged"] = d["verdict"] == "breaks"
        d["reference"] = ref
        d["message"] = _message(kind, d, ref, arl0, errors, model)
        kinds[kind] = d
    shape = ({"nb_alpha": {"median": health["median_nb_alpha"],
                           "max": float(max(m["alpha"] for m in models))}} if counts_model else
             {"ar_orders": {"median": float(np.median([m["phi"].size for m in models])),
                            "max": int(max(m["phi"].size for m in models))}})
    return {"checked": True, "detector": "split_glr", "model": model, "arl0": arl0,
            "paths": paths, "observations": int(exposure.sum()), "budget": budget,
            "path_cap": cap, "series_used": len(models), **shape,
            "median_path_length": float(np.median(exposure)), "health": health, "kinds": kinds,
            "flagged": any(v["flagged"] for v in kinds.values()), "seed": seed}
