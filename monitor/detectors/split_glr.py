"""Split GLR: compiled detector of a change in the regression's slope or level at an unknown time.

What it tests
-------------
Model (after the controls, whose effects the detector's own fit removes: ``y* = log q -
c' z``, :mod:`monitor.detectors.split_controls`, and "The controls' sums" below): ``y*_i = a +
b x_i + e_i`` with ``x_i = log p_i``. For a candidate change time
``tau`` the data split into a *before* sample B (everything up to ``tau``) and an *after*
sample A (``tau < i <= t``); each is fitted by least squares in its own centred coordinates
(``b_S = Sxy_S / Sxx_S``, level ``ybar_S`` at its mean price ``xbar_S``). Two likelihood
ratios (Chow 1960 two-sample tests; Kim, Mahmoud & Woodall 2003 and Zou, Zhang & Wang 2006
monitor a regression line's intercept and slope separately in the same way) are formed, with a
known error variance:

    slope:  2 G_s(tau) = (b_A - b_B)^2 / (sigma_s^2 (1/Sxx_A + 1/Sxx_B))
            (the level may change at tau as well: it is a nuisance here, so a pure level shift
            at tau does not move G_s)
    level:  2 G_l(tau) = d^2 / (sigma_l^2 (1/n_A + 1/n_B + (xbar_A - xbar_B)^2 / (Sxx_A + Sxx_B)))
            d = ybar_A - ybar_B - b_w (xbar_A - xbar_B),  b_w = (Sxy_A + Sxy_B) / (Sxx_A + Sxx_B)
            (a change of the level with a common slope)

``G_s`` is exactly the full two-coefficient GLR minus the level-only GLR (the F-test of the
slope dummy when the level dummy is in the model), so an ``elasticity_change`` alarm means a
change of the slope beats a level-only change by the likelihood by at least the threshold.
Each is maximized over candidate times; the *slope chart* alarms when ``max G_s > h_s`` and
the *level chart* when ``max G_l > h_l``; the argmax is the estimated change time (the
generalized likelihood ratio of Willsky & Jones 1976 and Lai 1998, window-limited).

Bounded state: candidate times at log-spaced checkpoints
--------------------------------------------------------
A candidate ``tau`` needs only the cumulative sums ``(n, Sx, Sxx, Sy, Sxy)`` at ``tau`` (the
sample A is the current sums minus those). ``NSLOT`` checkpoints are kept in a cascade: at every
observation slot 0 takes the current sums, and slot ``j`` takes slot ``j - 1``'s value every
``2^j`` observations, so the checkpoint ages are roughly 1, 2, 4, ..., with neighbouring ages
within a factor of about 2 (at most 2.6). Using the best checkpoint instead of the exact change
time keeps at least ``1/sqrt(2)`` and on average about 90% of the statistic's drift (a split
``tau < tau0`` dilutes the after sample, ``tau > tau0`` drops some of it), which is why a
ratio of 2 and not more. The oldest slot is the window start: data older than it (ages above
``2^(NSLOT-1)`` to ``2^NSLOT``) move into the *reference* sums R, which are part of every before
sample. R is capped at ``ref_cap`` observations (its sums are scaled down when above: the
estimate is unchanged, its variance treated as that of ``ref_cap`` observations, which is
conservative), so a slow drift is absorbed while a change within the window is not.

The before sample of checkpoint ``j`` is ``R + C_j``, the after sample ``C_t - C_j``: the test
uses all data, and its calibration does not depend on how much reference there is (the
variance has both samples' terms), which is what makes the design hold after a re-anchoring.

Scale, autocorrelation and heteroskedasticity
---------------------------------------------
``sigma^2`` is an exponentially weighted (``lam_s``, default 0.995) mean of the squared
one-step innovations of the pipeline's estimator, winsorized at 4 sigma and divided by
0.99988 = E[min(Z^2, 4^2)] (Huber 1981 style; consistency constant checked against scipy in
the tests), so a level shift or an outlier moves it little. Where the errors' variance depends
on the price, a row is winsorized at 4 of *its own* standard deviations, ``4 sqrt(v(x))``
(:func:`_row_var`), not of the average one: clipped at the average, the rows at high prices
(where the variance is largest) lost much of their square, which biased the sandwich factor
``kappa`` below (and the variance function's slope) and made the slope chart alarm 1.6x its
design at ARL0 2,000 and 4.0x at 20,000 when the error sd grows as ``exp(3 (x - xbar))``
(prices sd 0.15; measured on the design model, estimator forgetting 0.99, 300 series of 2,000
rows); with the row's own limit 0.93x and 1.13x. The score of the level test is
``e_t``, that of the slope test ``u_t = (x_t - xbar) e_t``; an EW lag-1 autocorrelation ``r`` of
each score inflates its variance by the AR(1) long-run factor ``(1 + r) / (1 - r)`` (r clipped
to [0, 0.9]; Newey & West 1987 in spirit). The slope score's variance is also compared with
``sigma^2 Var(x)`` (White 1980 sandwich factor ``kappa = E[u^2] / (sigma^2 E[(x - xbar)^2])``,
clipped to >= 1), so errors whose variance grows with the price do not inflate the false-alarm
rate: ``sigma_s^2 = sigma^2 kappa (1 + r_s) / (1 - r_s)``, ``sigma_l^2 = sigma^2 (1 + r_l) / (1 -
r_l)``. The sandwich factor is an average over the prices, but the maximum over candidates
picks after samples of 10-30 rows whose few far prices carry more (or less) noise than that
average: for those (checkpoints younger than ``2^NHX`` rows) the after sample's slope variance
is the one given its own prices, ``sum_A (x_i - xbar_A)^2 v(x_i) / Sxx_A^2``, with the
quadratic variance function ``v(x) = sigma^2 (1 + g1 t + g2 (t^2 - 1))``, ``t`` the standardized
price (:func:`_var_coef`: the regressors of White's 1980 test, coefficients from ``E[t e^2]``
and ``kappa``, kept only where significant), never below the homoskedastic ``sigma^2 /
Sxx_A`` (:func:`_after_var`; 17 floats: the window's and 7 checkpoints' raw sums of ``x^3``,
``x^4``, and a flag). A self-normalized variance from the after sample's own squared
innovations (White's HC0 on those rows) was not used: under a change the innovations carry
the change (``e ~ err + db (x - xbar)`` until the estimator adapts), which would inflate the
variance by ``1 + 3 db^2 Var(x) / sigma^2`` (1.75 for a change of 0.5 at the benchmark's price
and noise sd) and slow the detection; the model-based one uses moments frozen while a change
builds up. Measured (pipeline, the benchmark's "variance grows with price" pattern: sd ``0.15
exp(3 (x - xbar))``, 300 series of 2,000 rows, 600 at ARL0 20,000), slope alerts over the design:
1.72x / 4.09x at ARL0 2,000 / 20,000 before, 0.94x / 1.35x with the row's own winsorizing
limit (500 / 1,000 series), 0.85x / 0.95x with the after sample's own variance as well; homoskedastic patterns and
the delays of pivoting changes within Monte Carlo error of before.
The slope score's ``r_s`` is capped by the innovations' ``r_l``: for errors whose
autocorrelation does not depend on the prices, ``corr(u_t, u_{t-k}) = E[x_t x_{t-k} s_t s_{t-k}] /
E[x^2 s^2] rho_e(k) <= rho_e(k)`` (Cauchy-Schwarz), so the slope score is never more
autocorrelated than the errors. Its direct estimate is far noisier than ``r_l`` where the
squared centred prices are heavy-tailed and clustered (promotion runs of 20% cuts): on the
retail demo's rye-crackers (iid errors, lag-1 autocorrelation of ``x`` 0.20 from promo runs)
it read 0.15-0.20 (raised to 0.25 by the one-se margin), shrank the slope statistic by about
40% and hid a change of b from -1.4 to -2.2 for 113 rows; capped, it is found after 15 rows.
For prices and errors independent of each other the slope score's lag-1 autocorrelation is
the product of theirs, ``corr(u_t, u_{t-1}) = rho_x rho_e`` (``E[x_t x_{t-1} e_t e_{t-1}] =
E[x_t x_{t-1}] E[e_t e_{t-1}]``), so ``r_s`` is capped at ``r_x r_l`` as well, with ``r_x`` the
prices' own EW lag-1 autocorrelation (the centred price part ``sqrt(w) (x - xbar)``, its own EW
weight, raised by one se as the scores' are but clipped to 1, not R_MAX: four floats,
``PX0``). Why: with prices that move freely (``r_x`` near 0) and AR(1) errors, ``r_l`` is large,
the cap by it stops binding and ``r_s`` kept the noise of its own estimate (true value 0) raised
by one se, which held the slope chart at 0.58-0.78 of its budget (detection grid, AR(1) 0.3 and
0.6 errors, ARL0 2,000 and 20,000); setting ``r_s`` to 0 fixed those cells but let prices held
for weeks with AR(1) 0.6 errors alarm at 10.5x (``r_x`` near 1 there keeps ``r_s`` at ``r_l``).
Errors whose variance depends on the price break the product (``rho_u = E[w_t w_{t-1}] / E[w^2]
rho_e`` with ``w = (x - xbar) s(x)``, ``s(x)`` the errors' sd at price ``x``): with independent
prices ``(E[w])^2 / E[w^2] rho_e``, 0.09 ``rho_e`` at the grid's "variance grows with price"
pattern (``s = exp(3 (x - xbar))``, price sd 0.15; lognormal moments), where ``r_x`` reads 0, so
the cap is low by that much where such errors are also autocorrelated (not in the grid).

Working weights (the Poisson model)
-----------------------------------
Under ``[estimator] model = "poisson"`` the pipeline feeds the estimator's working response
``z = x' theta_{t-1} + (q - mu) / mu`` (``mu = exp(x' theta_{t-1} + offset)``, the one-step
prediction; :mod:`monitor.estimators.poisson_kernel`), whose variance ``phi / mu`` changes with
the level and the price. Each row enters every sum with the working weight ``w = mu``
(:func:`split_step_w`): ``n = sum w``, ``Sx = sum w x``, ``Sxx = sum w x^2``, ``Sy = sum w z``,
``Sxy = sum w x z``, and the scale is estimated from the standardized innovation ``e = sqrt(w)
(z - z_hat) = (q - mu) / sqrt(mu)``, the Pearson residual, so ``sigma^2`` estimates the
Pearson dispersion ``phi`` (1 for Poisson counts, ``1 + alpha mu`` on average for negative
binomial ones). The formulas above then hold with the weighted sums: a weighted least-squares
fit of ``z`` is one Fisher-scoring step of the Poisson regression (iteratively reweighted least
squares; McCullagh & Nelder 1989, sec. 2.5), and each ``2 G`` is the Poisson score statistic
(Rao 1948) of the change's regressor (``1_A`` for the level, ``1_A x`` beside it for the slope),
divided by ``phi`` (quasi-likelihood; Wedderburn 1974): the GLR in filter form of Willsky &
Jones (1976) on the Poisson model's own scale. The slope score becomes ``u = sqrt(w) (x -
xbar) e`` and the information ``E[w (x - xbar)^2]``, so the sandwich factor ``kappa`` and the
information per observation ``db^2 E[mu (x - xbar)^2] / (2 phi)`` (:func:`info_per_obs`) keep
their meaning. Rules that count rows use ``sum w / c``, with ``c`` the EW mean weight of the
series (:func:`row_unit`; held in ``D_HX``, whose variance function is not used here: the
weights already carry the variance's dependence on the mean), so the state layout is the log-log
model's. A level candidate also needs an expected count ``sum mu >= MIN_COUNT_LEVEL`` after its
change time (a few rows of small counts are far from normal; a slope candidate
``MIN_COUNT_SLOPE``), and the Pearson residuals are winsorized from the first row at ``4
max(1, sigma)`` (their scale under the model is known; the estimator's first predictions after
its warm-up can be far off). With weight 1 (the log-log
models) everything is as described above, to the bit.

Measured (pipeline, Poisson counts, b = -1.5, log-price sd 0.15, forgetting 0.995; 100-200
series of 5,000 rows per cell; alerts per 10,000 observations over the design, slope / level):

=====================  ===============  ===============
mean count             ARL0 2,000       ARL0 20,000
=====================  ===============  ===============
0.5                    0.38x / 0.38x    0.82x / 0.38x
2                      0.94x / 1.20x    0.92x / 1.18x
10                     1.06x / 1.32x    1.10x / 1.06x
=====================  ===============  ===============

(before the weights: 3.8x / 41x at a mean of 0.5 and no alert at all at 2 and 10, ARL0
2,000). Negative binomial counts break the level chart's design (heavy tails that ``phi`` does
not carry: 2.4-3.9x at NB2 alpha 1, 4.5-7.1x at alpha 3, means 2 and 10, ARL0 2,000); ``elmon
tune`` flags it (:mod:`monitor.tuning.count_check`). Delays against Lorden's bound at ARL0
2,000: a level shift by 2.7 in 17 / 5 / 2 rows at means 0.5 / 2 / 10 (bound 15 / 3.8 / 0.8),
by 0.7 in 208 / 68 / 14 (bound 295 / 74 / 15); a change of 0.5 in b pivoting at the typical
price in 178 rows at a mean of 10 (bound 258).

The controls' sums
------------------
For a series with controls every sum of the response (the reference R, the current window C,
each checkpoint and the level-free part L) holds ``y* = y - c' z`` with the control fit's
*current* ``c`` for all its rows, so every candidate is tested with one ``c``, the best so far.
The sums are linear in ``c``: beside them the state keeps the controls' own sums ``sum w z_k``
and ``sum w x z_k`` (for L the centred ``sum (x - xbar)(z_k - zbar_k)``), which follow every
move of the response sums (the cascade, the window start moving into R, the cap, the
re-anchorings), and when the fit's ``c`` changes by ``dc`` each response sum is re-expressed:
``Sy -= dc' Sz``, ``Sxy -= dc' Sxz`` (:func:`zs_express`, called by the pipeline before each
row; the row's controls come in ``ZS_ROW``). The aligned level candidates ("Labels") keep
theirs the same way (taken with the window's at a CUSUM reset, moved with the window start,
re-expressed, cleared). 2 x 6 floats for R, C, each of the 11 checkpoints and each of the 4
aligned candidates, 6 for L, 14 of bookkeeping: :data:`ZS_SIZE` = 224, only in pipelines whose
rows have controls (the pipeline's split block ends at :data:`ZS0` otherwise, and the block is
touched only while the control fit is on).

Why: before, each row entered its sums with the ``c`` the fit had when the row came. While the
fit is young its ``c`` moves, and a move of the coefficient of a control with a mean away from
zero (the tariff blocks' hour-of-day dummies: the peak dummy has mean 5/24) or of a control
whose mean drifts (heating degrees fall from about 5 to 2 from April to May) shifts the ``y*``
of the rows after it against those before: a level change to the level chart, and where the
control is collinear with the price a slope change too. Measured on the load demo (6 hourly
feeders, 4,368 rows each, ARL0 20,000: 2.6 false alerts expected per replay): 5.6 per replay
over seeds 1-10 (35 level shifts, 21 elasticity changes) and 4.6 over seeds 11-30 before;
2.1 and 1.7 with the current ``c`` (the same replays with the true coefficients: 2.2); the
true changes are all found within 52 hourly rows (49 before). With the current ``c`` the error
that is left is the fit's present error times the difference of the two samples' mean
controls, which shrinks as the fit sharpens.

The cost: after a change of b the fit (one b for the regime) takes part of the change into
the coefficients of controls collinear with the price until the alarm, and with the current
``c`` that part also bends the before sample (with the old scheme only the rows after it).
Measured (detection grid, pivot change of 0.5 with the ``collinear`` price pattern, 200
series): median delay 45.5 -> 52 rows at ARL0 2,000, 77.5 -> 83 at 20,000; the retail demo's
headline change (promotions collinear with the price) 13 / 32 / 28 / 56 / 32 -> 14 / 32 / 29 /
56 / 32 days for seeds 1-5. Series without controls are unchanged to the bit.

A state of the layout without these sums restores with them off (:data:`ZS_ON` 0): the
response sums then keep each row's ``c`` as before, until a slope alarm drops every sum
(:func:`reanchor_slope` turns them on; the pipeline sets the controls' count and ``c`` at
the next row). A state of the layout without the aligned candidates' sums (``ZS_AL``, the
block's last 48 floats) restores with them as zeros and the candidates unset, each until its
CUSUM next resets (:meth:`monitor.pipeline.run.Pipeline.checked_state`).

Start rule and re-anchoring
---------------------------
Rows are fed only once the estimator has left ``warming_up``. The level chart starts when
``min_rows`` (30) rows have been fed (the scale then rests on 30 innovations); the slope chart
starts when in addition the slope of all data so far has standard error ``sigma_s /
sqrt(Sxx) <= se_start`` (0.25: half the change of 0.5 the delays are quoted for). At the start
of a chart all sums so far become the reference and the checkpoints restart, so the
statistic starts at 0 (no burst at start). A level candidate may alarm with ``n_B >=
MIN_BEFORE_LEVEL`` (10) rows with their own level in its before sample and ``n_A >=
MIN_AFTER_LEVEL`` (3) after it.

Labels
------
A slope alarm also needs the slope change to beat, by a likelihood margin, every level-only
change the data allow, including those at candidates that may not alarm themselves (one or two
rows after the change time, or few rows before it). The margin is ``MARGIN`` (3.32,
chi-square(1) 0.99 / 2) at ARL0 20,000 and above and ``MARGIN + ln(arl0 / 20,000)`` below it,
at least 1 (:func:`slope_margin`; 1.01 at 2,000): a level shift that the slope candidates explain
as well as the level-only ones wins the slope label by chance with a probability that falls
about as ``exp(-margin)``, once per shift, while the budget it must keep to (``elasticity_change``
after a pure level shift no more often than in control) falls as ``1 / arl0``. Measured
(pipeline, detection grid cells, seed 12, ARL0 2,000; 200 series a slope cell, 500 in control
and per level shift), the whole margin -> 1.01 with the slope threshold redesigned for it (4.68
-> 4.79): a change of b of 0.8 under prices held 7-28 rows 2.77 -> 2.33 times the information
bound with the intercept held (91% -> 92.5% within 5 times), 2.50 -> 2.33 for a pivot;
``elasticity_change`` in control per 10,000 rows (budget 5) under held prices 2.29 -> 3.64,
long flat stretches 3.74 -> 3.97, independent prices 4.41 -> 4.76; after +20% / -20% / -50%
level shifts under held prices 2.08 / 2.68 / 1.76 -> 4.48 / 4.60 / 2.84, independent prices
4.16 / 3.44 / 3.92 -> 4.24 / 4.12 / 4.04; pivots labelled ``elasticity_change`` first 96-97% as
before (the slowest cell, 0.3 at price sd 0.1, 78% -> 82%). A margin of 1.0 at ARL0 20,000
raised ``elasticity_change`` after +20% / -20% shifts under held prices from 0.36 / 0.30 to 0.78
/ 0.84 per 10,000 (budget 0.5): hence the margin's growth with ``ln(arl0)``. The slope thresholds
below ARL0 20,000 are designed with the smaller margin (:mod:`monitor.detectors.split_design`).
Symmetrically, a
level alarm needs the level-only change at its change time to beat every *slope-only* change
(b moves, demand at the before sample's mean price stays: ``z = 1_A (x - xbar_B)``) by the same
margin (:func:`_level_vs_pivot`; comparing two non-nested one-parameter alternatives by their
likelihood ratio and calling neither while it is small is Vuong's 1989 model-selection test;
Zou, Zhang & Wang 2006 ask the same question, which parameter moved, of a regression line).
Where the price has been held since the change the two are tied exactly (the after sample
cannot tell a level shift from a slope change), and both charts wait for the price to move:
the level chart because its label is not earned, the slope chart because its candidates older
than the change could explain the step between their pre-change rows and the held price by a
slope. Measured at ARL0 2,000 with prices held 7-28 rows (pipeline, 100 series): a pure slope
change of 0.3 / 0.5 / 0.8 opened elasticity_change first in 58% / 46% / 35% of series before
this rule, 94% / 96% / 95% with it.

Where the errors' variance depends on the price the two alternatives are not compared with one
variance: the pivot's regressor ``x - xbar_B`` is largest at the far prices, where noise that
grows with the price is largest, so with the average variance its statistic ran high and the
level label was rarely earned (in control, the grid's "variance grows with price" pattern: mean
``G_pivot`` of checkpoints 3-6 0.82 against the 0.5 of half a chi-square(1), the level-only
0.47, with r = 0 and the true innovations, tests/test_split_label_hetero.py; the level chart at
0.22x its design at ARL0 2,000, 0.32x at 20,000). Each now has the variance its own score has
given the after sample's prices (:func:`_label_vars`: the heteroskedasticity-robust score
statistic, White 1980 and Davidson & MacKinnon 1985, with the model's variance function
``v(x)`` of "Scale, autocorrelation and heteroskedasticity": the mean of ``v`` over A for the
level, weighted by ``(x_i - xbar_B)^2`` for the pivot; mean ``G_pivot`` 0.46, level-only 0.47
on the same rows). Both are ``v(x1)`` where A sits at one price ``x1``, so the held-price tie
stays; where the variance function is off (no significant heteroskedasticity, working weights,
checkpoints of 128 rows and more, which have no sums of ``x^3``, ``x^4``) the one variance is
used as before, to the bit. Not so on every path of the design model (homoskedastic): over
20,000 rows the variance function passes its significance test by chance on some rows, and 24
of 300 paths (split_design's simulation, seed 1, before the cap of ``r_s``) had a
different level-chart record; the level threshold solved from those paths moved 5.266 -> 5.254
at ARL0 2,000 (6.287 -> 6.285 at 5,000; the slope chart's records were the same), within the
table's Monte Carlo error; the whole table was regenerated after the merge (5 December 2026,
22:00 UTC: level column -0.04 at ARL0 2,000, within 0.01 from 5,000 to 20,000; split_table.py).
Measured (pipeline, seed 12, with
the cap of ``r_s`` by the prices' autocorrelation; in control 500 series of 2,000 rows at ARL0
2,000 and 1,000 at 20,000, per 10,000 rows, ``elasticity_change`` / ``level_shift``, design 5
and 0.5):

=========================  ==========================  ==========================
pattern                    ARL0 2,000                  ARL0 20,000
=========================  ==========================  ==========================
variance grows with price  3.60 / 1.10 -> 3.60 / 2.02  0.45 / 0.14 -> 0.44 / 0.20
steps sd0.15               3.54 / 1.21 -> 3.59 / 1.26  0.36 / 0.19 -> 0.36 / 0.18
indep sd0.1                4.93 / 5.24 -> 4.95 / 5.24  0.51 / 0.42 -> 0.51 / 0.43
=========================  ==========================  ==========================

(before the price-autocorrelation cap of ``r_s``, the same cells read 1.10 -> 2.01 and 0.16 ->
0.23 for the level chart under variance-grows, the others within an alert). Step prices at ARL0
2,000 (200 series, median delay over the bound, ``elasticity_change`` first): pivots of 0.3 /
0.8 0.97x / 2.35x -> 0.97x / 2.37x (95% / 96% -> 93% / 97%), changes of b with the intercept
held 1.13x / 2.39x -> 1.13x / 2.27x, within 5 bounds 91.5-94% before and after;
``elasticity_change`` in the 500 rows after +20% / -20% / -50% level shifts (500 series) 4.32 /
4.40 / 2.72 -> 4.36 / 4.40 / 2.68. The level chart under price-dependent noise stays below its
design (0.40x / 0.40x), and the label is still what holds it (ARL0 2,000, 500 series, before
the cap): without the label rule 10.51 per 10,000 (independent prices 9.64, against 5.44 with
it), with the rule but the alarm's own ``G_l`` in place of the label's level-only statistic
4.52 (independent prices 5.51). The alarm's ``G_l`` has the samples' own variances from the
linear variance function of :func:`_var_at` (clipped to 4 sigma^2), the label's level-only
statistic the quadratic one over A's prices, so the two differ at the far prices where the
level alarms of such series come. The same variances for the checkpoints of 128 rows and more
(A's third and fourth moments the normal's) moved it within Monte Carlo error (2.14 / 0.27
against 2.01 / 0.23), not kept. Anchoring the label at the alarm's ``G_l`` (the pivot's
statistic scaled by the same factor, which keeps the tie) gave 3.50 / 0.65 (0.70x / 1.30x):
above the band at 20,000, so not kept; the level statistic's own variance at far prices is the
lead to follow.

The candidate change times are the log-spaced checkpoints, so the level-only alternatives the
slope alarm must beat do not include the change time itself: after a level shift the nearest
checkpoints either miss some of its rows or mix rows from before it into the after sample,
and a large shift loses much of its level statistic either way (a -50% shift is 4.6 sd of the
noise per row). An older checkpoint's after sample meanwhile holds rows before the shift at
their held prices and rows after it at another, and the full (level + slope) fit there
explains the step by a slope. Under step prices this raised ``elasticity_change`` on pure level
shifts: traced on the grid's steps cell at ARL0 20,000, a -50% shift at observation 1000 with
the price moving at the same row, at the shift's second row the slope candidate of age 25 (23
rows at the old price, 2 at the new) had G_s + G_l = 19.2, the best checkpoint's level-only
statistic 9.97 (age 1) and the level-only statistic at the true change time about 21. So the
level-only alternatives include *aligned* candidates whose change time the data place: two
CUSUMs of the standardized innovations per direction (Page 1954; reference values ``k`` of 0.5
and 2 sd, :data:`AL_KS`), each keeping the current window's sums at its last reset, which is
the maximum-likelihood change time of a shift of ``2 k`` (Hinkley 1971). They enter only the
slope alarm's margin (never an alarm of either chart, whose designed candidates stay the
checkpoints), and only where their level statistic passes the level threshold ``h_l`` (a
level change the level chart would call significant takes the label from the slope; below it
the checkpoints' alternatives decide, as before). Measured (pipeline, grid cells, seed 12;
``elasticity_change`` per 10,000 rows in the 500 after the shift, steps pattern):

==============  ===================  ==========================  ===========================
ARL0            in control (steps)   +20% / -20% / -50% before   +20% / -20% / -50% with them
==============  ===================  ==========================  ===========================
2,000 (500)     2.34 -> 2.29         2.68 / 3.44 / 3.32          2.12 / 2.44 / 1.76
20,000 (1,000)  0.37 -> 0.36         0.86 / 0.98 / 1.44          0.42 / 0.26 / 0.30
==============  ===================  ==========================  ===========================

(series per cell in brackets; the in-control cells have 2,000 rows per series, the shift
cells 1,500). Without the gate (every aligned candidate in the margin) the shifts fell further
(1.52 / 1.80 / 1.40 and 0.22 / 0.18 / 0.30) but so did the in-control slope rate of step
prices (2.34 -> 1.73 at ARL0 2,000), and pivot changes under step prices were found later (db
0.8: median 55.5 -> 61 rows at ARL0 2,000; with the gate 59). One CUSUM per direction (k =
0.5 only, no gate) left 27 alerts of 1,000 series at -50% (ARL0 20,000): its last reset lagged
a large shift by a few rows when a small drift had kept it above zero. The cost: a change of b
with the intercept held under step prices (a level step of ``db log p0`` with it) no longer
opens ``elasticity_change`` in the first rows from the misplaced candidates; it waits for the
price to move and for the level alarm, and is found later (median 97.5 -> 105.5 rows for db
0.5, 68 -> 75 for db 0.8 at ARL0 2,000; 130.5 -> 138.5 and 73.5 -> 79.5 at 20,000; 200 series).
Series with controls have them too: each candidate's controls' sums are kept beside its
response sums and re-expressed with the fit's ``c`` ("The controls' sums"; before, a series
whose controls' sums were kept had none). Measured (pipeline, seed 12, ``elasticity_change``
in the 500 rows after +20% / -20% / -50% shifts, 500 series at ARL0 2,000 and 1,000 at 20,000;
design 125 and 25): step prices with a control drawn apart from the price (``z ~ N(0,
0.15^2)``, coefficient 0.5) 75 / 72 / 90 -> 53 / 48 / 41 and 56 / 49 / 101 -> 28 / 15 / 15;
the grid's ``collinear stretch`` (independent prices, where the candidates matter little)
105 / 96 / 95 -> 104 / 94 / 93 and 15 / 33 / 24 -> 15 / 32 / 21. In control within a few
alerts (steps with the control, slope / level alerts: 210 / 146 -> 202 / 145 at 2,000, 71 /
29 -> 68 / 30 at 20,000; collinear stretch 430 / 559 -> 429 / 557 and 90 / 84 -> 90 / 84). The
cost is the one above, now for series with controls too (steps with the control, 200 series,
median delay at ARL0 2,000 / 20,000): a change of b with the intercept held 103 -> 115 / 128.5
-> 139 rows (db 0.5), 64 -> 73.5 / 69 -> 77.5 (db 0.8); pivots 79.5 -> 81.5 / 109 -> 109 (db
0.5), 49.5 -> 54.5 / 57.5 -> 61 (db 0.8); the collinear stretch's pivots and held changes
within a row of before.

After a *slope* alarm (argmax checkpoint ``j``) every sum is dropped
(:func:`reanchor_slope`), the slope chart restarts under the start rule on new rows, and a
further change is looked for from there. After a *level* alarm the data before the change
time keep their slope information but lose their level (:func:`reanchor_level`: their centred
sums move into the level-free part L), so a slope change that arrived together with a level
change is still measured against the old slope. The rows after it stay in the window with
their level when the alarm is strong (an aligned candidate's level statistic at least
:data:`KEEP_LEVEL` times the level threshold): the window then starts at the checkpoint at or
just after that candidate's change time, so the candidate at the window start is the two-sample
slope test at the change time with a free level on each side (Chow 1960), fed by every row of
the new regime. Before, those rows lost their level too and the slope chart compared only the
rows after the alarm: under step prices one price step there is explained as well by a second
level shift at that step as by a change of b, and a change of b with the intercept held waited
for the 3rd-5th price step of the new regime (grid cell steps sd0.15 held db0.8, ARL0 2,000,
200 series: median 75 -> 66 rows, 84% -> 91% within 5 bounds; at ARL0 20,000 79.5 -> 70, 86%
-> 94%). A weak alarm (an in-control false one is weak) still retires the after sample, whose
level is the selected, overshooting one: kept at any strength, the rows' overshoot opened a
second level_shift and the in-control level alerts at ARL0 2,000 rose 1.26-1.47x (independent
prices 5.43 -> 6.91 per 10,000); with the factor 2 they are as before to within one alert per
cell.

Bits of the returned flags: ``SG_SLOPE`` and ``SG_LEVEL`` (alarms at this row), ``SG_FED``.

>>> import numpy as np
>>> rng = np.random.default_rng(1)
>>> st, p = np.zeros(state_size()), params(h_slope=11.0, h_level=11.0)
>>> alarms = []
>>> for t in range(1200):
...     x = rng.normal(0.0, 0.15)
...     b = -1.0 if t < 800 else -1.8              # the slope changes at t = 800, level held
...     y = 2.0 + b * x + rng.normal(0.0, 0.15)
...     e = y - 2.0 - (-1.0 if t < 800 else -1.8) * x   # stand-in for the estimator's innovation
...     f = split_step(st, 0, x, y, e, float(t), float(t), p)
...     if f & SG_SLOPE:
...         alarms.append(t)
...         reanchor_slope(st, 0, p)
>>> len(alarms), 800 < alarms[0] < 900
(1, True)
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit


# ---------------------------------------------------------------- state layout (floats)
(D_ON_L, D_ON_S, D_T, D_NF, D_X0, D_W, D_S2, D_E1, D_UU, D_U1, D_XX, D_MX, D_PE, D_PU,
 D_GS, D_GL, D_JS, D_JL, D_HOT, D_HX) = range(20)
# reference sums (with their level), level-free reference sums, current window sums
R0 = 20          # R_N, R_SX, R_SXX, R_SY, R_SXY
L0 = 25          # L_N, L_XX, L_XY (centred sums of data whose level was retired)
C0 = 28          # C_N, C_SX, C_SXX, C_SY, C_SXY
SLOT0 = 33       # NSLOT slots of (n, sx, sxx, sy, sxy, ts)
SLOT_W = 6
#: checkpoints; the oldest is the window start (ages up to 2^(NSLOT-1) .. 2^NSLOT - 1)
NSLOT = 11
#: the detector's own fit of the control coefficients (written by the pipeline,
#: :mod:`monitor.pipeline.split_events`, with :mod:`monitor.detectors.split_controls`): a flag
#: (the controls were identified and the rows are fed) and the packed normal equations of
#: ``log q`` on ``(1, log p, z_1 .. z_NCF)``; controls beyond ``NCF`` use the estimator's
#: current coefficient. Not read by :func:`split_step` (it sees only ``y*``).
NCF = 6
CFIT_ON = SLOT0 + SLOT_W * NSLOT
CFIT0 = CFIT_ON + 1
#: floats of the packed normal equations (upper triangle of a (NCF + 3) square)
CFIT_SIZE = (NCF + 3) * (NCF + 4) // 2
#: the after sample's price-dependent variance (module docstring, "Scale, autocorrelation and
#: heteroskedasticity"): a flag (the sums below are complete since the window last restarted)
#: and the raw sums of ``x^3`` and ``x^4`` of the current window and of the youngest ``NHX``
#: checkpoints. Appended after the control fit, so that a state of the previous layout
#: restores by padding zeros (flag 0: the after sample's variance is the average's until the
#: window next restarts). Only differences ``current - checkpoint`` are read.
HX0 = CFIT0 + CFIT_SIZE
HX_ON = HX0
HX_C = HX0 + 1
#: checkpoints that keep them: after samples of up to 2^NHX rows (the slope test needs
#: MIN_AFTER = 10, so checkpoints 3..NHX - 1 use them; slots 0..2 carry them along)
NHX = 7
HX_SLOT = HX_C + 2
HX_SIZE = 3 + 2 * NHX
#: the level-only alternatives at change times found by the data (module docstring, "Labels"):
#: per direction (up, down) and reference value (``AL_KS``) a CUSUM of the standardized
#: innovations and the sums ``(n, Sx, Sxx, Sy, Sxy)`` of the current window at its last reset,
#: with a flag (the sums are set). Inserted before the controls' sums, so that a state of the
#: previous layout restores by inserting zeros (flags 0: no such alternative until the CUSUM
#: next resets)
AL0 = HX0 + HX_SIZE
AL_W = 7
#: reference values of those CUSUMs (in sd of the innovations): Page's (1954) CUSUM with
#: reference k, whose last reset is the maximum-likelihood change time of a shift of 2 k
#: (Hinkley 1971); 0.5 for shifts of about 1 sd, 2 for shifts of 4 sd and more (whose
#: statistic loses most from a misplaced change time)
AL_KS = (0.5, 2.0)
NAL = 2 * len(AL_KS)
AL_SIZE = NAL * AL_W
#: the prices' own lag-1 autocorrelation (module docstring, "Scale, autocorrelation and
#: heteroskedasticity"): a flag (the previous row's price part is set), the EW weight of the
#: mean below (its own, so that a restored state does not read a mean of few terms as one of
#: many), the previous row's centred price part ``sqrt(w) (x - xbar)`` and the EW mean of its
#: lag-1 product. Inserted before the controls' sums, so that a state of the previous layout
#: restores by inserting zeros (flag 0: the slope score's autocorrelation is capped by the
#: errors' alone, as before, until the moments build up)
PX0 = AL0 + AL_SIZE
PX_ON = PX0
PX_W = PX0 + 1
PX_P = PX0 + 2
PX_1 = PX0 + 3
PX_SIZE = 4
#: the controls' sums (module docstring, "The controls' sums"): a flag (the sums are complete
#: and the response sums are in units of the current ``c``), the number of controls ``kz``
#: (at most NCF), the ``c`` the response sums are expressed with, the current row's controls,
#: then ``sum w z_k`` and ``sum w x z_k`` of the reference R, the current window C and each
#: checkpoint, the centred ``sum (x - xbar)(z_k - zbar_k)`` of the level-free part L, and
#: ``sum w z_k``, ``sum w x z_k`` of each aligned candidate (``ZS_AL``). Appended after the
#: sums of x^3, x^4, so that a state of the previous layout restores by padding zeros (flag 0:
#: the response sums keep the control fit's ``c`` as it was when each row came, as before,
#: until every sum is next dropped by a slope alarm). Only pipelines whose rows have controls
#: have this block (the pipeline's split block is ``ZS0`` floats otherwise); it is read and
#: written only while the control fit is on (``CFIT_ON``)
ZS0 = PX0 + PX_SIZE
ZS_ON = ZS0
ZS_K = ZS0 + 1
ZS_C = ZS0 + 2
ZS_ROW = ZS_C + NCF
ZS_R = ZS_ROW + NCF
ZS_CW = ZS_R + 2 * NCF
ZS_SLOT = ZS_CW + 2 * NCF
ZS_W = 2 * NCF
ZS_L = ZS_SLOT + ZS_W * NSLOT
#: the aligned candidates' controls' sums, ``ZS_W`` floats each. Appended at the end of the
#: block, so that a state of the layout before (with controls: ``AL_ZS_SIZE`` floats fewer)
#: restores by padding zeros; the restore clears the candidates' flags (their sums are not
#: in the current ``c``), and each comes in when its CUSUM next resets
ZS_AL = ZS_L + NCF
AL_ZS_SIZE = ZS_W * NAL
ZS_SIZE = ZS_AL + AL_ZS_SIZE - ZS0
SPLIT_SIZE = ZS0 + ZS_SIZE

# ---------------------------------------------------------------- parameters
(Q_HS, Q_HL, Q_CAP, Q_MINROWS, Q_LAMS, Q_SESTART, Q_LEVEL_ON, Q_SLOPE_ON, Q_HOTS,
 Q_HOTL, Q_LMARGIN, Q_WEIGHTED, Q_MIN_WEIGHT, Q_MIN_WEIGHT_S, Q_SMARGIN) = range(15)
SPLIT_PARAMS = 15
DEFAULT_REF_CAP = 2000.0
DEFAULT_MIN_ROWS = 30.0
DEFAULT_LAM_SCALE = 0.995
DEFAULT_SE_START = 0.25
#: E[min(Z^2, c^2)] for Z ~ N(0, 1), c = 4 (winsorized variance consistency constant)
WINSOR_C = 4.0
WINSOR_K = 0.99988
R_MAX = 0.9
#: largest row variance over the average that the winsorizing limit follows (:func:`_row_var`)
ROW_VAR_CAP = 10.0
#: chi-square(1) 0.99 quantile / 2: the likelihood margin of a level-only change over a
#: slope-only one (a level alarm's label), and of a slope change over every level-only one at
#: ARL0 20,000 and above (:func:`slope_margin`)
MARGIN = 3.3174
#: the ARL0 from which the slope alarm's margin is the whole :data:`MARGIN`
MARGIN_ARL0 = 20000.0
#: the slope alarm's smallest margin (:func:`slope_margin`)
MARGIN_MIN = 1.0
#: fewest rows after a candidate change time for the slope test: with fewer, a slope rests on
#: a handful of residuals and heavy tails or price-dependent noise decide it (the smallest
#: slope change the issue asks about needs far more rows than this anyway)
MIN_AFTER = 10.0
#: fewest rows after a candidate change time for the level test (one or two rows would make
#: the test a judgement on single residuals: their tails, not the level, would decide it)
MIN_AFTER_LEVEL = 3.0
#: fewest rows before a candidate change time for a level alarm. The test is calibrated for
#: any size (its variance has the 1 / n_B term), so this only keeps single residuals from
#: deciding it; it matters after a level alarm, whose re-anchoring retires the old level:
#: with 30 (min_rows), a second shift within 30 rows of a level alarm could never alarm
#: (measured: 7 of 400 series missed a -50% shift under step prices that way)
MIN_BEFORE_LEVEL = 10.0
#: with working weights (Poisson model): fewest expected counts (sum of ``mu``) after a level
#: candidate's change time. A few rows of small counts are far from normal (their upper tail is
#: much heavier): at a mean of 0.5 with the row rules alone the level chart alarmed about 2.5x
#: as often as designed (ARL 790 at ARL0 2,000, detector fed the true means). Measured in the
#: pipeline (level alerts / design at ARL0 2,000 and 20,000), with 5: mean 0.5 0.72x / 0.88x,
#: mean 2 1.63x / -; with 7: 0.55x / 0.54x, 1.46x / 1.62x; with 10: 0.38x / 0.38x, 1.20x /
#: 1.18x (mean 10: 1.32x / 1.06x with any of them). The safe side: 10
MIN_COUNT_LEVEL = 10.0
#: the same for a slope candidate. At a mean of 0.5 the slope statistic's tail is heavier than
#: the design's, so no single value fits both ARL0s: with 5 the pipeline measured 0.59x at ARL0
#: 2,000 and 1.8x at 20,000, with 10 0.38x and 0.82x (the lower, safe side at both); from a
#: mean of about 1 up the rows rule (MIN_AFTER) is the stricter one
MIN_COUNT_SLOPE = 10.0
#: level statistic above which the scale stops updating (the level chart's part of the freeze
#: while a change builds up, :func:`split_step`): the value the thresholds were designed with
#: (:mod:`monitor.detectors.split_design` simulates the freeze at this point for every ARL0).
#: It was half the level threshold (2.54 at ARL0 2,000), which froze the scale on far more
#: in-control rows than the design did, and a false alarm is likelier while the scale is frozen
#: (the excursion's own residuals no longer raise the scale and, with autocorrelated errors,
#: the AR(1) factor): level alerts / design at ARL0 2,000, pipeline, benchmarks.detection_grid
#: control cells, 500 series x 2,000 rows, seed 12: independent prices 1.23x / 1.28x -> 1.08x /
#: 1.15x, AR(1) errors 0.3 / 0.6 1.37x / 1.79x -> 0.99x / 0.87x; at ARL0 20,000 (half the
#: threshold 3.91) unchanged within Monte Carlo error; AR(1) errors of 0.9 3.28x -> 0.92x. The
#: slope chart's point stays at half its threshold: moving it to 4 as well lowered the slope
#: chart's in-control rates further (independent prices 0.92x / 0.99x -> 0.85x / 0.94x, AR(1)
#: 0.6 0.61x -> 0.49x at ARL0 2,000) and slowed changes of b with the intercept held. Cost of
#: this one, measured on slope_cells (1,000 series, seed 12): changes of b of 0.3 / 0.5 with
#: the intercept held are found about 4% later at ARL0 2,000 (the old freeze stopped the scale
#: from taking in the innovations of the change after the level alarm); pivots unchanged
HOT_LEVEL = 4.0
#: EW weight of the scale (``D_W``, 57 rows at ``lam_s`` 0.995) below which an alarm does not
#: hold the scale for :data:`HOLD` rows (a hot statistic still freezes it at any weight, as in
#: the design runs). A scale frozen low on a few dozen rows stayed frozen: the statistics it
#: scales ran high, the alarms came every 30-40 rows and each re-armed the hold before the last
#: one ended. Measured (AR(1) errors 0.6, 300 series, seed 12, ARL0 2,000): one series froze its
#: scale at 0.0099 (the others: 0.022) after 37 rows and raised 53 level alerts to its end (1
#: with this rule). An earlier form of the rule (no freeze at all below this weight, commit
#: be1ed59) let a large early change into the scale: a change of b of 0.9 after 60 rows (noise
#: 0.1, information about 1.6 per row; tests/test_replay_outputs_same.py) went hot at a weight
#: of 47, the scale rose from 0.10 to 0.18 and the lag-1 autocorrelation to 0.51 in four rows,
#: and no alert followed; with the hold alone gated it opens elasticity_change 8 rows after the
#: change, as before. In-control rates at ARL0 2,000 (benchmarks.detection_grid control cells,
#: 500 series, seed 12) within 3 alerts per cell of either form
FREEZE_MIN_W = 50.0
#: rows after an alarm during which the scale is not updated (the estimator re-converges).
#: Longer is worse for false alarms: a false alarm is more likely when the scale happens to be
#: low, and freezing it for 200 rows more than doubled the level chart's false alarms on held
#: prices and AR(1) errors (measured); shorter slows the slope alarm that follows a level
#: shift with held prices (the estimator's innovations are then not noise for a while)
HOLD = 50.0
#: a level alarm keeps the rows since its data-placed change time in the window, with their
#: level, when an aligned candidate's level statistic is at least this many times the level
#: threshold (module docstring, "Start rule and re-anchoring"): measured (detection grid, seed
#: 12) with 1, the in-control level alerts at ARL0 2,000 rose 1.26-1.47x (independent prices
#: 5.43 -> 6.91 per 10,000: a false alarm's kept rows carry its overshooting level); with 2 they
#: are as before within one alert per cell, and the held-intercept changes of b under step
#: prices gain as much (db 0.8 at ARL0 2,000: 3.15 -> 2.77 times the bound either way)
KEEP_LEVEL = 2.0

# flags
SG_SLOPE, SG_LEVEL, SG_FED = 1, 2, 4

# report vector (split_report)
(RP_TS, RP_NA, RP_BB, RP_BB_SE, RP_BA, RP_BA_SE, RP_LEVEL, RP_LEVEL_SE, RP_STAT,
 RP_DFB, RP_DFA) = range(11)
REPORT_SIZE = 11


def state_size() -> int:
    """Floats of one series' split-GLR state: 33 + 6 x NSLOT + 1 + (NCF + 3)(NCF + 4) / 2 + 3 +
    2 x NHX + 7 x NAL + 2 + 2 NCF + 2 NCF (NSLOT + 2 + NAL) + NCF (414 with 11 checkpoints, 6
    controls, 7 checkpoints with sums of x^3, x^4 and 4 aligned level candidates; 224 of them
    the controls' sums, which a pipeline whose rows have no controls leaves out: 190)."""
    return SPLIT_SIZE


def slope_margin(arl0: float) -> float:
    """The likelihood margin a slope alarm's change must beat every level-only change by, for
    false-alarm budget ``arl0``: ``MARGIN + ln(arl0 / MARGIN_ARL0)`` between :data:`MARGIN_MIN`
    and :data:`MARGIN` (module docstring, "Labels").

    A pure level shift that the slope alarm's candidates explain by a slope wins the label by
    chance, with probability falling about as ``exp(-margin)`` (the tail of a difference of
    log-likelihood ratios), once per shift; the budget it has to stay within, the in-control
    rate ``1 / arl0`` per observation, falls as ``1 / arl0``. So the margin grows with
    ``ln(arl0)``: 3.32 (chi-square(1) 0.99 / 2) at ARL0 20,000 and above, 1.01 at 2,000, 1.0 below.

    >>> round(slope_margin(2000), 2), round(slope_margin(20000), 4), slope_margin(500)
    (1.01, 3.3174, 1.0)
    """
    return max(MARGIN_MIN, min(MARGIN, MARGIN + math.log(float(arl0) / MARGIN_ARL0)))


def params(h_slope: float, h_level: float, *, ref_cap: float = DEFAULT_REF_CAP,
           min_rows: float = DEFAULT_MIN_ROWS, lam_scale: float = DEFAULT_LAM_SCALE,
           se_start: float = DEFAULT_SE_START, level_on: bool = True,
           slope_on: bool = True, level_margin: float = MARGIN,
           weighted: bool = False, min_weight: float | None = None,
           min_weight_slope: float | None = None,
           margin_slope: float = MARGIN) -> np.ndarray:
    """Parameter vector of :func:`split_step` (thresholds in units of G = log-likelihood
    ratio, i.e. half the chi-square(1) statistic). ``weighted``: rows come with working
    weights (:func:`split_step_w`, the Poisson model; module docstring, "Working weights");
    ``min_weight``: fewest total weight (expected count) after a level candidate's change time
    for it to alarm (default :data:`MIN_COUNT_LEVEL` with weights, 0 without);
    ``min_weight_slope``: the same for a slope candidate (:data:`MIN_COUNT_SLOPE`);
    ``margin_slope``: the likelihood margin of a slope alarm over every level-only change
    (:func:`slope_margin` of the ARL0; ``level_margin`` the level alarm's). The scale
    freezes while the slope statistic is above ``h_slope / 2`` or the level statistic above
    :data:`HOT_LEVEL`."""
    p = np.zeros(SPLIT_PARAMS)
    p[Q_HS], p[Q_HL], p[Q_CAP], p[Q_MINROWS] = h_slope, h_level, ref_cap, min_rows
    p[Q_LAMS], p[Q_SESTART] = lam_scale, se_start
    p[Q_LEVEL_ON], p[Q_SLOPE_ON] = float(level_on), float(slope_on)
    p[Q_HOTS], p[Q_HOTL] = 0.5 * h_slope, HOT_LEVEL
    p[Q_LMARGIN] = level_margin
    p[Q_SMARGIN] = margin_slope
    p[Q_WEIGHTED] = float(weighted)
    p[Q_MIN_WEIGHT] = (MIN_COUNT_LEVEL if weighted else 0.0) if min_weight is None else min_weight
    p[Q_MIN_WEIGHT_S] = ((MIN_COUNT_SLOPE if weighted else 0.0) if min_weight_slope is None
                         else min_weight_slope)
    return p


@njit(cache=True, inline="always")
def row_unit(st, at, p):
    """The weight of a typical row, ``c``: 1 without working weights; with them the EW mean
    of the weights (module docstring, "Working weights"), held in ``D_HX``. A sum of weights
    divided by ``c`` counts rows (for the rules that are about rows: fewest rows on each side
    of a change time, the reference cap, degrees of freedom, the change's first row)."""
    if p[Q_WEIGHTED] == 0.0:
        return 1.0
    c = st[at + D_HX]
    return c if c > 0.0 else 1.0


@njit(cache=True, inline="always")
def _nrows(n, unit):
    """Rows in a sample of weight ``n`` (whole rows; exact without weights)."""
    return np.floor(n / unit + 0.5)


# ---------------------------------------------------------------- helpers
@njit(cache=True, inline="always")
def _r_upper(r, neff):
    """A lag-1 autocorrelation estimate ``r`` (from ``neff`` effective rows) raised by up to
    one standard error ``sqrt((1 - r^2) / neff)`` (Bartlett 1946), smoothly from none at
    ``r <= 0`` to all of it from ``r >= 2 se``; clipped to [0, R_MAX].

    The AR(1) variance factor ``(1 + r) / (1 - r)`` is convex and steep in r (slope 12.5 at
    r = 0.6), so plugging in a noisy estimate makes the statistic too large half of the time
    and, through the exponential tail of its maximum, raised the level chart's false alarms to
    about 2x its design with AR(1) errors 0.6 (measured 14:35 UTC, ARL0 2,000). Independent
    errors (r near 0, for which the thresholds were designed) are left almost unchanged."""
    return min(_r_price(r, neff), R_MAX)


@njit(cache=True, inline="always")
def _r_price(r, neff):
    """:func:`_r_upper` clipped to [0, 1] instead of [0, R_MAX]: the prices' lag-1
    autocorrelation, which multiplies the errors' (a price held for weeks has ``r`` near 1, and
    the slope score then keeps the errors' ``r_l`` whole, as before)."""
    if not (r > 0.0):
        return 0.0
    se = np.sqrt(max(1.0 - r * r, 0.0) / neff)
    w = min(r / (2.0 * se), 1.0) if se > 0.0 else 1.0
    return min(r + w * se, 1.0)


@njit(cache=True, inline="always")
def _scales(st, at):
    """``(sigma^2, kappa, r_s, r_l)``: the winsorized scale, the slope score's sandwich factor
    and the lag-1 autocorrelations of the slope and level scores (clipped to [0, R_MAX])."""
    m2 = st[at + D_S2]
    if not (m2 > 0.0):
        return np.nan, np.nan, 0.0, 0.0
    s2 = m2 / WINSOR_K
    neff = max(2.0 * st[at + D_W] - 1.0, 1.0)
    rl = _r_upper(st[at + D_E1] / m2, neff)
    uu = st[at + D_UU]
    xx = st[at + D_XX]
    rs = 0.0
    kap = 1.0
    if uu > 0.0:
        rs = _r_upper(st[at + D_U1] / uu, neff)
        if xx > 0.0:
            kap = max(uu / (m2 * xx), 1.0)
    # the slope score is never more autocorrelated than the errors, nor (for prices and
    # errors independent of each other) than the errors times the prices (module docstring)
    rs = min(rs, rl)
    wx = st[at + PX_W]
    if wx > 0.0 and rs > 0.0 and xx > 0.0:
        rs = min(rs, _r_price(abs(st[at + PX_1]) / xx, max(2.0 * wx - 1.0, 1.0)) * rl)
    return s2, kap, rs, rl


@njit(cache=True, inline="always")
def _lrf(r, n):
    """Variance factor of a sum of ``n`` AR(1) terms with lag-1 autocorrelation ``r`` over the
    independent case: ``1 + 2 sum_{k<n} (1 - k/n) r^k = (1 + r)/(1 - r) - 2 r (1 - r^n) /
    (n (1 - r)^2)`` (the long-run factor ``(1 + r)/(1 - r)`` as n grows)."""
    if r <= 0.0 or n <= 1.0:
        return 1.0
    q = 1.0 - r
    return (1.0 + r) / q - 2.0 * r * (1.0 - r ** n) / (n * q * q)


@njit(cache=True, inline="always")
def _var_at(st, at, s2, mx, weighted):
    """The error variance at mean log price ``mx`` (centred coordinates): ``sigma^2 + g (mx -
    xbar)`` with ``g = E[(x - xbar) e^2] / E[(x - xbar)^2]`` (a linear variance function, so
    the level test of a few rows at high or low prices uses their own variance), kept within
    [sigma^2 / 4, 4 sigma^2]. With working weights (``weighted``) ``sigma^2`` itself: the
    weights carry the variance's dependence on the mean, and ``D_HX`` holds the row unit."""
    xx = st[at + D_XX]
    if weighted or not (xx > 0.0):
        return s2
    # the slope of the variance per sd of log price, relative to sigma^2, has a standard error
    # of about sqrt(2 / neff) under constant variance (normal errors); it is shrunk towards 0
    # by 2.5 of those (soft threshold): with step prices a short sample sits at one far price,
    # and a noisy slope there made the level chart run at 1.6x its design (measured 14:35 UTC)
    sx = np.sqrt(xx)
    g = st[at + D_HX] / (WINSOR_K * xx) * sx / s2
    cut = 2.5 * np.sqrt(2.0 / max(2.0 * st[at + D_W] - 1.0, 1.0))
    if abs(g) <= cut:
        return s2
    g = g - cut if g > 0.0 else g + cut
    v = s2 + g * s2 / sx * (mx - st[at + D_MX])
    return min(max(v, 0.25 * s2), 4.0 * s2)


@njit(cache=True, inline="always")
def _row_var(st, at, x):
    """The winsorized mean square of the innovations expected at log price ``x`` (centred
    coordinates), for the row's winsorizing limit: ``m2 (1 + g1 t + g2 (t^2 - 1))`` with ``t =
    (x - xbar) / sd(x)`` and ``m2`` the EW winsorized mean square (``D_S2``), kept within [m2,
    ROW_VAR_CAP m2] (the limit is never below the average's).

    A quadratic variance function fitted by the moments the state already keeps: ``g1 =
    E[t e^2] / m2`` (``D_HX``) and ``g2 = (E[t^2 e^2] / m2 - 1) / 2 = (kappa - 1) / 2``
    (``D_UU``), the least-squares coefficients of ``e^2 / m2`` on ``t`` and ``t^2 - 1`` when
    ``t`` has the normal's third and fourth moments (0 and 3; White 1980 tests
    heteroskedasticity with the same regressors). Each is kept only where it exceeds 2.5 of
    its standard errors under constant variance (``sqrt(2 / neff)`` for ``g1``, ``sqrt(1 /
    neff)`` for ``g2``; a hard threshold), so a series without heteroskedasticity keeps the
    average's limit, and its statistics are unchanged to the bit. Hard, not soft as in
    :func:`_var_at`: shrinking both by 2.5 se (0.18 at ``neff`` 400) left the variance at high
    prices about 20% low, and the slope chart at 1.24x its design at ARL0 20,000 instead of
    1.13x (design model, 600 series; sd growing as ``exp(3 (x - xbar))``)."""
    m2 = st[at + D_S2]
    g1, g2, sx = _var_coef(st, at)
    if g1 == 0.0 and g2 == 0.0:
        return m2
    t = (x - st[at + D_MX]) / sx
    v = m2 * (1.0 + g1 * t + g2 * (t * t - 1.0))
    return min(max(v, m2), ROW_VAR_CAP * m2)


@njit(cache=True, inline="always")
def _var_coef(st, at):
    """``(g1, g2, sd(x))`` of the variance function ``v(x) / m2 = 1 + g1 t + g2 (t^2 - 1)``
    (:func:`_row_var`); ``(0, 0, .)`` where no heteroskedasticity is significant or there are
    no moments yet. Unweighted rows only (the caller checks)."""
    m2 = st[at + D_S2]
    xx = st[at + D_XX]
    if not (xx > 0.0) or not (m2 > 0.0):
        return 0.0, 0.0, 0.0
    sx = np.sqrt(xx)
    cut = 2.5 * np.sqrt(2.0 / max(2.0 * st[at + D_W] - 1.0, 1.0))
    g1 = st[at + D_HX] / (sx * m2)
    g1 = g1 if abs(g1) > cut else 0.0
    z2 = (st[at + D_UU] / (xx * m2) - 1.0) / np.sqrt(2.0)    # g2 sd(t^2 - 1), sd = sqrt(2)
    z2 = z2 if abs(z2) > cut else 0.0
    return g1, z2 / np.sqrt(2.0), sx


@njit(cache=True, inline="always")
def _after_var(st, at, j, na, mxa, cxa, s2, weighted):
    """The variance of the after sample's slope given its prices, ``sum_A (x_i - xbar_A)^2
    v(x_i) / Sxx_A^2`` with the variance function ``v = sigma^2 (1 + g1 t + g2 (t^2 - 1))`` of
    :func:`_var_coef`, or -1 where it does not apply (working weights, no significant
    heteroskedasticity, a checkpoint without the sums of ``x^3`` and ``x^4``, or sums not
    complete since the window restarted).

    With ``v`` written around the sample's mean price ``m`` as ``v(m) + v'(m) (x - m) +
    (v''/2) (x - m)^2``, the sum is ``v(m) M2 + v'(m) M3 + (v''/2) M4`` with ``M_k`` the
    sample's central moment sums (from its raw sums of ``x^0..x^4``)."""
    if weighted or j >= NHX or st[at + HX_ON] == 0.0 or not (cxa > 0.0):
        return -1.0
    on, m3, m4, v0, v1, q2 = _a_var_poly(st, at, j, na, mxa, cxa, s2)
    if not on:
        return -1.0
    return (v0 * cxa + v1 * m3 + q2 * m4) / (cxa * cxa)


@njit(cache=True, inline="always")
def _a_var_poly(st, at, j, na, mxa, cxa, s2):
    """``(on, M3, M4, v0, v1, q2)``: the after sample A's (since checkpoint ``j < NHX``) third
    and fourth central moment sums, from the window's and the checkpoint's raw sums of ``x^3``,
    ``x^4``, and the variance function of :func:`_var_coef` written around A's mean price
    ``m``: ``v(x) = v0 + v1 (x - m) + q2 (x - m)^2``; ``on`` False where that function is off
    (no significant heteroskedasticity). Shared by :func:`_after_var` and :func:`_label_vars`;
    the caller checks the sums are complete (``HX_ON``, ``j < NHX``)."""
    g1, g2, sx = _var_coef(st, at)
    if g1 == 0.0 and g2 == 0.0:
        return False, 0.0, 0.0, 0.0, 0.0, 0.0
    o = at + HX_SLOT + 2 * j
    s3 = st[at + HX_C] - st[o]
    s4 = st[at + HX_C + 1] - st[o + 1]
    m = mxa
    s2r = cxa + na * m * m
    m3 = s3 - 3.0 * m * s2r + 2.0 * m * m * m * na
    m4 = s4 - 4.0 * m * s3 + 6.0 * m * m * s2r - 3.0 * m * m * m * m * na
    # v in x around m: coefficients from v(x) = s2 (1 - g2 + g1 t + g2 t^2), t = (x - c) / sx
    q1 = s2 * g1 / sx
    q2 = s2 * g2 / (sx * sx)
    dm = m - st[at + D_MX]
    v0 = s2 * (1.0 - g2) + q1 * dm + q2 * dm * dm
    v1 = q1 + 2.0 * q2 * dm
    return True, m3, m4, v0, v1, q2


@njit(cache=True, inline="always")
def _moments(n, sx, sxx, sy, sxy):
    """Mean price, mean response, centred Sxx and Sxy of a sample given by its raw sums."""
    if n <= 0.0:
        return 0.0, 0.0, 0.0, 0.0
    mx = sx / n
    my = sy / n
    cxx = sxx - sx * mx
    if cxx < 0.0:
        cxx = 0.0
    return mx, my, cxx, sxy - sx * my


@njit(cache=True, inline="always")
def _candidate(st, at, j, s2, kap, rs, rl, minw_s, unit, weighted):
    """:func:`_candidate_o` of checkpoint ``j``."""
    return _candidate_o(st, at, at + SLOT0 + SLOT_W * j, j, s2, kap, rs, rl, minw_s, unit,
                        weighted)


@njit(cache=True, inline="always")
def _samples(st, at, o, na):
    """The after sample ``C - (sums at o)`` (of weight ``na``) and the before sample ``R + (sums
    at o)`` with the level-free part L: ``(mx_A, my_A, Sxx_A, Sxy_A, n_B, mx_B, my_B, Sxx_B,
    Sxy_B)``, centred sums (L's added to B's)."""
    mxa, mya, cxa, cya = _moments(na, st[at + C0 + 1] - st[o + 1], st[at + C0 + 2] - st[o + 2],
                                  st[at + C0 + 3] - st[o + 3], st[at + C0 + 4] - st[o + 4])
    nb = st[at + R0] + st[o]
    mxb, myb, cxb, cyb = _moments(nb, st[at + R0 + 1] + st[o + 1], st[at + R0 + 2] + st[o + 2],
                                  st[at + R0 + 3] + st[o + 3], st[at + R0 + 4] + st[o + 4])
    cxb += st[at + L0 + 1]
    cyb += st[at + L0 + 2]
    return mxa, mya, cxa, cya, nb, mxb, myb, cxb, cyb


@njit(cache=True, inline="always")
def _level_g(st, at, na, mxa, mya, cxa, cya, nb, mxb, myb, cxb, cyb, ra, rb, s2, kap, rs, rl,
             unit, weighted):
    """``G_l`` of a candidate from its samples (:func:`_samples`; ``ra``, ``rb`` their rows,
    B's with L), -1 where undefined; ``n_B >= unit`` is the caller's."""
    tiny = 1e-12
    cx = cxa + cxb
    dx = mxa - mxb
    bw = (cya + cyb) / cx if cx > tiny else 0.0
    if cx > tiny or dx == 0.0:
        v = (_lrf(rl, ra) * _var_at(st, at, s2, mxa, weighted) / na
             + _lrf(rl, nb / unit) * _var_at(st, at, s2, mxb, weighted) / nb
             + (s2 * kap * _lrf(rs, ra + rb) * dx * dx / cx if cx > tiny else 0.0))
        d = mya - myb - bw * dx
        return 0.5 * d * d / v
    return -1.0


@njit(cache=True, inline="always")
def _level_o(st, at, o, s2, kap, rs, rl, unit, weighted):
    """``G_l`` of :func:`_candidate_o` alone, the same arithmetic (the aligned candidates use
    only it): -1 where undefined. Written for speed, it measured no faster (the compiler
    already dropped the unused outputs of the inlined :func:`_candidate_o`: pipeline, 1,000
    series x 2,000 rows, 1.30-1.36 / 1.82-1.86 CPU s per million rows without / with a
    control either way); kept because it says what the aligned candidates compute."""
    na = st[at + C0] - st[o]
    if na < 1.0 * unit or not (s2 > 0.0):
        return -1.0
    mxa, mya, cxa, cya, nb, mxb, myb, cxb, cyb = _samples(st, at, o, na)
    if not (nb >= 1.0 * unit):
        return -1.0
    return _level_g(st, at, na, mxa, mya, cxa, cya, nb, mxb, myb, cxb, cyb, na / unit,
                    (nb + st[at + L0]) / unit, s2, kap, rs, rl, unit, weighted)


@njit(cache=True, inline="always")
def _candidate_o(st, at, o, j, s2, kap, rs, rl, minw_s, unit, weighted):
    """``(G_s, G_l, n_A, n_B, G_l0, G_p)`` of checkpoint ``j`` (-1 where undefined; ``G_l`` is
    computed from one row on each side of the change time, the caller decides which may
    alarm; ``G_l0`` and ``G_p`` compare a level-only with a slope-only change for the label,
    see :func:`_level_vs_pivot`). ``unit``: the weight of a typical row (:func:`row_unit`),
    ``weighted``: working weights in use, ``minw_s``: fewest total weight after the change
    time for a slope statistic; ``o``: offset of the candidate's sums ``(n, Sx, Sxx, Sy,
    Sxy)`` (a checkpoint's, or an aligned candidate's with ``j = NHX``: no sums of x^3, x^4;
    the aligned candidates use :func:`_level_o`, its ``G_l`` alone)."""
    na = st[at + C0] - st[o]
    gs = -1.0
    gl = -1.0
    if na < 1.0 * unit or not (s2 > 0.0):
        return gs, gl, na, 0.0, 0.0, 0.0
    mxa, mya, cxa, cya, nb, mxb, myb, cxb, cyb = _samples(st, at, o, na)
    nbs = nb + st[at + L0]
    tiny = 1e-12
    ra = na / unit
    rb = nbs / unit
    if na >= MIN_AFTER * unit and na >= minw_s and cxa > tiny * na and cxb > tiny:
        db = cya / cxa - cyb / cxb
        va = s2 * kap / cxa
        qa = _after_var(st, at, j, na, mxa, cxa, s2, weighted)
        if qa >= 0.0:
            # the after sample's variance given its own prices (never below the
            # homoskedastic one, at most ROW_VAR_CAP times the average's)
            va = min(max(qa, s2 / cxa), ROW_VAR_CAP * va)
        gs = 0.5 * db * db / (va * _lrf(rs, ra) + s2 * kap * _lrf(rs, rb) / cxb)
    gl0 = 0.0
    gp = 0.0
    if nb >= 1.0 * unit:
        gl = _level_g(st, at, na, mxa, mya, cxa, cya, nb, mxb, myb, cxb, cyb, ra, rb, s2, kap,
                      rs, rl, unit, weighted)
        # the two alternatives' error variances: each the mean of the variance function over
        # the after sample's prices with its own regressor's squares as weights where the
        # variance depends on the price (:func:`_label_vars`), else the one average variance
        v = s2 * _lrf(rl, ra)
        vp = v
        wl, wp = _label_vars(st, at, j, na, mxa, cxa, mxa - mxb, s2, weighted)
        if wl > 0.0:
            f = _lrf(rl, ra)
            v = wl * f
            vp = wp * f
        gl0, gp = _level_vs_pivot(na, nb, mxa - mxb, mya - myb, cxa, cya, cxb, cyb, v, vp)
    return gs, gl, na, nb, gl0, gp


@njit(cache=True, inline="always")
def _level_vs_pivot(na, nb, dx, dy, cxa, cya, cxb, cyb, v, vp):
    """``(G_level, G_pivot)``: the two one-parameter alternatives to "no change" at one
    candidate time, with error variances ``v`` (level) and ``vp`` (pivot): the same ``v`` where
    the errors' variance does not depend on the price (so they compare as likelihoods), else
    each the variance its own score has given the after sample's prices (:func:`_label_vars`).

    Null model: one line ``y = a + b x`` through the before sample B and the after sample A
    (plus the level-free part L, which shares only the slope; its centred sums are in
    ``cxb``, ``cyb``). Level-only change: regressor ``z = 1_A``. Slope-only change pivoting at
    B's mean price (demand at the typical price unchanged, b moves: the "pure" slope change):
    ``z = 1_A (x - xbar_B)``. For either, ``G = (z' M y)^2 / (2 v z' M z)`` with ``M`` the
    null model's residual maker (Frisch-Waugh-Lovell); in the samples' centred sums, with
    ``h = n_A n_B / (n_A + n_B)``, ``S = Sxx_A + Sxx_B + h dx^2`` and ``T = Sxy_A + Sxy_B + h
    dx dy`` (``dx``, ``dy`` the differences of the samples' mean price and response):

        level:  z'My = h (dy S - dx T) / S,       z'Mz = h (Sxx_A + Sxx_B) / S
        pivot:  z'My = (P S - Q T) / S,           z'Mz = Q Sxx_B / S
                P = Sxy_A + h dx dy,  Q = Sxx_A + h dx^2

    When the after sample sits at one price (``Sxx_A = 0``: a price held since the change)
    the two regressors are proportional on A and ``G_pivot = G_level`` exactly: the data
    cannot tell a level shift from a slope change there, and neither label is earned (the two
    variances of :func:`_label_vars` are then equal too)."""
    n = na + nb
    tiny = 1e-12
    if n <= 0.0 or not (v > 0.0) or not (vp > 0.0):
        return 0.0, 0.0
    h = na * nb / n
    S = cxa + cxb + h * dx * dx
    T = cya + cyb + h * dx * dy
    if not (S > tiny):
        return 0.0, 0.0
    gl0 = 0.0
    zz = h * (cxa + cxb) / S
    if zz > tiny:
        zy = h * (dy * S - dx * T) / S
        gl0 = 0.5 * zy * zy / (v * zz)
    gp = 0.0
    Q = cxa + h * dx * dx
    zz = Q * cxb / S
    if zz > tiny * max(Q, 1.0):
        zy = ((cya + h * dx * dy) * S - Q * T) / S
        gp = 0.5 * zy * zy / (vp * zz)
    return gl0, gp


@njit(cache=True, inline="always")
def _label_vars(st, at, j, na, mxa, cxa, dx, s2, weighted):
    """``(v_level, v_pivot)``: the error variances of :func:`_level_vs_pivot`'s two alternatives
    at checkpoint ``j`` given the after sample's own prices, or ``(-1, -1)`` where the one
    average variance applies (working weights, no significant heteroskedasticity, a checkpoint
    without the sums of ``x^3``, ``x^4``, or sums not complete since the window restarted: the
    cases of :func:`_after_var`, so those statistics are unchanged to the bit).

    Where the variance depends on the price, ``v(x) = sigma^2 (1 + g1 t + g2 (t^2 - 1))``
    (:func:`_var_coef`), the score ``z'M e`` of a one-regressor extension ``z`` has variance
    ``z'M V M z``, not ``v z'M z``, and the heteroskedasticity-robust score statistic is ``G =
    (z'M y)^2 / (2 z'M V M z)`` (White 1980; the robust LM test of Davidson & MacKinnon 1985,
    with the model's ``V`` in place of squared residuals, as :func:`_after_var` does). Both
    regressors are zero before the change time, and ``M z`` is ``z`` on the after sample A up
    to its projection on the null line, whose share is of order ``n_A / n_B`` (checkpoints
    ``j < NHX``: at most 127 rows after, a window of hundreds to thousands before); dropping it,
    ``z'M V M z / z'M z`` is the mean of ``v`` over A with ``z^2`` as weights:

        level (z = 1_A):              v_level = sum_A v(x_i) / n_A
        pivot (z = 1_A (x - xbar_B)):  v_pivot = sum_A (x_i - xbar_B)^2 v(x_i)
                                                 / sum_A (x_i - xbar_B)^2

    (checked against the exact ``z'M V M z`` of the rows in tests/test_split_label_hetero.py:
    the robust statistic was 0.7% larger for 13 rows after, 3.3% for 61, 5% for 125). With
    ``v`` written around A's mean price ``m`` (:func:`_after_var`) as ``v0 + v1 u + q2 u^2``, ``u
    = x - m``, and ``d = m - xbar_B`` (``dx``): ``sum_A v = n_A v0 + q2 M2`` and ``sum_A (u +
    d)^2 v = v0 (M2 + n_A d^2) + v1 (M3 + 2 d M2) + q2 (M4 + 2 d M3 + d^2 M2)``, ``M_k`` A's
    central moment sums. Where A sits at one price ``x1`` (``M2 = 0``) both are ``v(x1)``: the
    exact tie of a held price stays. Each is kept within ``[sigma^2 / ROW_VAR_CAP, ROW_VAR_CAP
    sigma^2]`` (the quadratic is a fit, not a variance: it must stay positive)."""
    if weighted or j >= NHX or st[at + HX_ON] == 0.0:
        return -1.0, -1.0
    if not (cxa >= 0.0) or not (na > 0.0):
        return -1.0, -1.0
    on, m3, m4, v0, v1, q2 = _a_var_poly(st, at, j, na, mxa, cxa, s2)
    if not on:
        return -1.0, -1.0
    lo = s2 / ROW_VAR_CAP
    hi = s2 * ROW_VAR_CAP
    vl = min(max(v0 + q2 * cxa / na, lo), hi)
    d = dx
    den = cxa + na * d * d
    vp = vl
    if den > 0.0:
        num = (v0 * den + v1 * (m3 + 2.0 * d * cxa)
               + q2 * (m4 + 2.0 * d * m3 + d * d * cxa))
        vp = min(max(num / den, lo), hi)
    return vl, vp


# ---------------------------------------------------------------- the controls' sums
@njit(cache=True, inline="always")
def _kz(st, at):
    """Controls whose sums are kept (0 without controls or while the sums are off). The block
    is read only where the control fit is on (``CFIT_ON``): a pipeline whose rows have no
    controls has no such block (its split state ends at ``ZS0``)."""
    if st[at + CFIT_ON] == 0.0 or st[at + ZS_ON] == 0.0:
        return 0
    return int(st[at + ZS_K])


@njit(cache=True, inline="always")
def _zs_slot(at, j):
    """Offset of checkpoint ``j``'s controls' sums (``sum w z``, then ``sum w x z``)."""
    return at + ZS_SLOT + ZS_W * j


@njit(cache=True, inline="always")
def _al_zs(at, d):
    """Offset of aligned candidate ``d``'s controls' sums (``sum w z``, then ``sum w x z``)."""
    return at + ZS_AL + ZS_W * d


@njit(cache=True, inline="always")
def _zs_copy(st, dst, src, kz):
    for k in range(kz):
        st[dst + k] = st[src + k]
        st[dst + NCF + k] = st[src + NCF + k]


@njit(cache=True, inline="always")
def _zs_axpy(st, dst, src, a, kz):
    """``dst += a src`` for the controls' sums of two sum sets."""
    for k in range(kz):
        st[dst + k] += a * st[src + k]
        st[dst + NCF + k] += a * st[src + NCF + k]


@njit(cache=True, inline="always")
def _zs_scale(st, dst, f, kz):
    for k in range(kz):
        st[dst + k] *= f
        st[dst + NCF + k] *= f


@njit(cache=True, inline="always")
def _zs_zero(st, dst):
    for k in range(ZS_W):
        st[dst + k] = 0.0


@njit(cache=True, inline="always")
def zs_express(st, at, c, c0):
    """Re-express every response sum (R, C, the checkpoints, L and the aligned candidates) with
    the control coefficients ``c[c0:c0 + kz]`` instead of the ones they hold (``ZS_C``): the
    sums of ``y* = y - c' z`` are linear in ``c``, so ``Sy* -= dc' Sz`` and ``Sxy* -= dc' Sxz``
    with ``dc`` the change of ``c``. A no-op while the sums are off."""
    kz = _kz(st, at)
    if kz == 0:
        return
    for k in range(kz):
        dc = c[c0 + k] - st[at + ZS_C + k]
        if dc == 0.0:
            continue
        st[at + ZS_C + k] = c[c0 + k]
        st[at + R0 + 3] -= dc * st[at + ZS_R + k]
        st[at + R0 + 4] -= dc * st[at + ZS_R + NCF + k]
        st[at + C0 + 3] -= dc * st[at + ZS_CW + k]
        st[at + C0 + 4] -= dc * st[at + ZS_CW + NCF + k]
        for j in range(NSLOT):
            o = at + SLOT0 + SLOT_W * j
            q = _zs_slot(at, j)
            st[o + 3] -= dc * st[q + k]
            st[o + 4] -= dc * st[q + NCF + k]
        st[at + L0 + 2] -= dc * st[at + ZS_L + k]
        for d in range(NAL):
            b = at + AL0 + AL_W * d
            q = _al_zs(at, d)
            st[b + 5] -= dc * st[q + k]
            st[b + 6] -= dc * st[q + NCF + k]


@njit(cache=True, inline="always")
def _add_ref(st, at, n, sx, sxx, sy, sxy, cap):
    """Move a block of sums into the reference R, then cap R (with the level-free part L);
    the caller moves the block's controls' sums into R's, the cap scales them as well."""
    st[at + R0] += n
    st[at + R0 + 1] += sx
    st[at + R0 + 2] += sxx
    st[at + R0 + 3] += sy
    st[at + R0 + 4] += sxy
    kz = _kz(st, at)
    tot = st[at + R0] + st[at + L0]
    if tot > cap:
        f = cap / tot
        for i in range(5):
            st[at + R0 + i] *= f
        for i in range(3):
            st[at + L0 + i] *= f
        if kz > 0:
            _zs_scale(st, at + ZS_R, f, kz)
            for k in range(kz):
                st[at + ZS_L + k] *= f


@njit(cache=True, inline="always")
def _al_take(st, at, d):
    """Aligned candidate ``d`` resets: CUSUM 0, its sums the current window's (with the
    controls' sums, all ``NCF`` of them, wherever the control fit is on: the window's are
    kept, or zero, whenever they are read)."""
    b = at + AL0 + AL_W * d
    st[b] = 0.0
    st[b + 1] = 1.0
    for m in range(5):
        st[b + 2 + m] = st[at + C0 + m]
    if st[at + CFIT_ON] != 0.0:
        _zs_copy(st, _al_zs(at, d), at + ZS_CW, NCF)


@njit(cache=True, inline="always")
def _al_reset(st, at):
    """The aligned candidates restart at the current sums (the window restarted)."""
    for d in range(NAL):
        _al_take(st, at, d)


@njit(cache=True, inline="always")
def _al_rebase(st, at, n, sx, sxx, sy, sxy, zj, kz, last):
    """The window start moved by the block ``(n, ...)`` whose controls' sums are at ``zj``
    (:func:`_rebase`, before it clears them; :func:`_rebase_al`, whose block is candidate
    ``last``'s own, so that one goes last: -1 for none): an aligned candidate after it is
    re-expressed like the checkpoints, one before it collapses onto the start."""
    for d3 in range(NAL):
        d = (last + 1 + d3) % NAL
        b = at + AL0 + AL_W * d
        if st[b + 2] >= n:
            _take_out(st, b + 2, _al_zs(at, d), n, sx, sxx, sy, sxy, zj, kz)
        else:
            for m in range(5):
                st[b + 2 + m] = 0.0
            if kz > 0:
                _zs_zero(st, _al_zs(at, d))


@njit(cache=True, inline="always")
def _al_step(st, at, e, s2):
    """One row of the CUSUMs (after the row entered the current sums): ``z = e / sigma``
    clipped to +-WINSOR_C; a CUSUM that resets takes the current sums as its candidate (the
    change, if any, comes after this row)."""
    z = 0.0
    if s2 > 0.0:
        z = min(max(e / np.sqrt(s2), -WINSOR_C), WINSOR_C)
    for d in range(NAL):
        b = at + AL0 + AL_W * d
        c = st[b] + (z if d % 2 == 0 else -z) - AL_KS[d // 2]
        if c <= 0.0 or not (s2 > 0.0):
            _al_take(st, at, d)
        else:
            st[b] = c


@njit(cache=True, inline="always")
def _al_level(st, at, s2, kap, rs, rl, unit, weighted):
    """The largest level statistic ``G_l`` of the aligned candidates (0 where none is set)."""
    g = 0.0
    for d in range(NAL):
        b = at + AL0 + AL_W * d
        if st[b + 1] == 0.0:
            continue
        gl = _level_o(st, at, b + 2, s2, kap, rs, rl, unit, weighted)
        if gl > g:
            g = gl
    return g


@njit(cache=True, inline="always")
def _rebase(st, at, j):
    """Make checkpoint ``j`` the window start: its sums move into R (the caller decides what
    R is), later checkpoints and the current sums are re-expressed from it, older slots
    collapse onto it."""
    o = at + SLOT0 + SLOT_W * j
    n, sx, sxx, sy, sxy = st[o], st[o + 1], st[o + 2], st[o + 3], st[o + 4]
    ts = st[o + 5]
    kz = _kz(st, at)
    zj = _zs_slot(at, j)
    _al_rebase(st, at, n, sx, sxx, sy, sxy, zj, kz, -1)
    # the sums of x^3, x^4 are not re-expressed (only differences are read): later slots
    # (empty after this) take checkpoint j's, which is what they now stand for
    if j < NHX:
        for i in range(j + 1, NHX):
            st[at + HX_SLOT + 2 * i] = st[at + HX_SLOT + 2 * j]
            st[at + HX_SLOT + 2 * i + 1] = st[at + HX_SLOT + 2 * j + 1]
    if kz > 0:                      # the controls' sums are re-expressed the same way
        for i in range(NSLOT):
            if i < j:
                _zs_axpy(st, _zs_slot(at, i), zj, -1.0, kz)
        _zs_axpy(st, at + ZS_CW, zj, -1.0, kz)
        for i in range(NSLOT - 1, j - 1, -1):
            _zs_zero(st, _zs_slot(at, i))
    for i in range(NSLOT):
        q = at + SLOT0 + SLOT_W * i
        if i >= j:
            st[q] = 0.0
            st[q + 1] = 0.0
            st[q + 2] = 0.0
            st[q + 3] = 0.0
            st[q + 4] = 0.0
            st[q + 5] = ts
        else:
            st[q] -= n
            st[q + 1] -= sx
            st[q + 2] -= sxx
            st[q + 3] -= sy
            st[q + 4] -= sxy
    st[at + C0] -= n
    st[at + C0 + 1] -= sx
    st[at + C0 + 2] -= sxx
    st[at + C0 + 3] -= sy
    st[at + C0 + 4] -= sxy
    return n, sx, sxx, sy, sxy


@njit(cache=True, inline="always")
def _take_out(st, q, zq, n, sx, sxx, sy, sxy, zd, kz):
    """The sums at ``q`` (their controls' sums at ``zq``) less the block ``(n, ...)`` whose
    controls' sums are at ``zd``."""
    st[q] -= n
    st[q + 1] -= sx
    st[q + 2] -= sxx
    st[q + 3] -= sy
    st[q + 4] -= sxy
    if kz > 0:
        _zs_axpy(st, zq, zd, -1.0, kz)


@njit(cache=True, inline="always")
def _rebase_al(st, at, d):
    """Make aligned candidate ``d``'s change time the window start (a strong level alarm's
    re-anchoring, :func:`reanchor_level`; the caller has retired the sums before it): later
    checkpoints, aligned candidates and the current sums are re-expressed from it, older
    checkpoints collapse onto it. The candidate keeps no time and no sums of ``x^3``, ``x^4``:
    the collapsed checkpoints take a time interpolated by rows between the checkpoints around
    it (exact for evenly spaced rows) and the sums of ``x^3``, ``x^4`` of the checkpoint just
    before it, so the after-sample variance of :func:`_after_var` at the window start counts
    a few retired rows' third and fourth powers (it is bounded there: never below the
    homoskedastic variance, at most ``ROW_VAR_CAP`` times the average's)."""
    b = at + AL0 + AL_W * d
    n, sx, sxx, sy, sxy = st[b + 2], st[b + 3], st[b + 4], st[b + 5], st[b + 6]
    kz = _kz(st, at)
    zd = _al_zs(at, d)        # read until the end: candidate d itself is re-expressed last
    # the youngest checkpoint at or before the candidate (checkpoint n at most the candidate's)
    jo = NSLOT - 1
    for i in range(NSLOT):
        if st[at + SLOT0 + SLOT_W * i] <= n:
            jo = i
            break
    qo = at + SLOT0 + SLOT_W * jo
    ts = st[qo + 5]
    if jo > 0:
        qy = qo - SLOT_W
        dn = st[qy] - st[qo]
        if dn > 0.0:
            ts += (n - st[qo]) / dn * (st[qy + 5] - ts)
    for i in range(NSLOT):
        q = at + SLOT0 + SLOT_W * i
        if i < jo:
            _take_out(st, q, _zs_slot(at, i), n, sx, sxx, sy, sxy, zd, kz)
        else:
            for m in range(5):
                st[q + m] = 0.0
            st[q + 5] = ts
            if kz > 0:
                _zs_zero(st, _zs_slot(at, i))
            if i < NHX and i != jo:
                st[at + HX_SLOT + 2 * i] = st[at + HX_SLOT + 2 * jo]
                st[at + HX_SLOT + 2 * i + 1] = st[at + HX_SLOT + 2 * jo + 1]
    _take_out(st, at + C0, at + ZS_CW, n, sx, sxx, sy, sxy, zd, kz)
    _al_rebase(st, at, n, sx, sxx, sy, sxy, zd, kz, d)


@njit(cache=True, inline="always")
def _clear_hx(st, at):
    """The window restarts empty: its sums of ``x^3``, ``x^4`` are complete from here."""
    for i in range(HX_SIZE - 1):
        st[at + HX_C + i] = 0.0
    st[at + HX_ON] = 1.0


@njit(cache=True, inline="always")
def _restart(st, at, ts, cap):
    """All data so far become the reference; every checkpoint at the current time."""
    n, sx, sxx, sy, sxy = st[at + C0], st[at + C0 + 1], st[at + C0 + 2], st[at + C0 + 3], \
        st[at + C0 + 4]
    kz = _kz(st, at)
    if kz > 0:
        _zs_axpy(st, at + ZS_R, at + ZS_CW, 1.0, kz)
        _zs_zero(st, at + ZS_CW)
        for i in range(NSLOT):
            _zs_zero(st, _zs_slot(at, i))
    for i in range(5):
        st[at + C0 + i] = 0.0
    for i in range(NSLOT):
        q = at + SLOT0 + SLOT_W * i
        for m in range(5):
            st[q + m] = 0.0
        st[q + 5] = ts
    st[at + D_T] = 0.0
    _clear_hx(st, at)
    _al_reset(st, at)
    _add_ref(st, at, n, sx, sxx, sy, sxy, cap)


# ---------------------------------------------------------------- the step
@njit(cache=True, inline="always")
def split_step(st, at, x, y, e, n_obs, ts, p):
    """Feed one row (state ``st[at:]``): ``x = log p``, ``y = y*`` (controls removed), ``e`` the
    estimator's one-step innovation (for the scale), ``n_obs`` the series' observation number,
    ``ts`` its time. Returns the flags (``SG_*``); the caller re-anchors after an alarm
    (:func:`reanchor_slope` / :func:`reanchor_level`). A NaN ``x``, ``y`` or ``e`` is skipped.
    Every row has weight 1 (:func:`split_step_w` with ``w = 1``)."""
    return split_step_w(st, at, x, y, e, 1.0, n_obs, ts, p)


@njit(cache=True, inline="always")
def split_step_w(st, at, x, y, e, wt, n_obs, ts, p):
    """:func:`split_step` for a row of working weight ``wt > 0`` (module docstring, "Working
    weights"): ``y`` the working response (controls removed), ``e = sqrt(wt) (y - y_hat)`` the
    standardized innovation whose variance the scale estimates (the Pearson residual
    ``(q - mu) / sqrt(mu)`` under the Poisson model, whose ``wt = mu``). With ``wt = 1`` (and
    ``p[Q_WEIGHTED] = 0``) it is the unweighted detector to the bit. A row with a NaN or a
    weight that is not positive is skipped."""
    if not (x == x) or not (y == y) or not (e == e) or not (wt > 0.0):
        return 0
    weighted = p[Q_WEIGHTED] != 0.0
    if st[at + D_NF] == 0.0:
        st[at + D_X0] = x
        for i in range(NSLOT):
            st[at + SLOT0 + SLOT_W * i + 5] = ts
    x = x - st[at + D_X0]
    y = y
    lam = p[Q_LAMS]
    # --- scale, autocorrelation and sandwich statistics (EW, weight D_W); frozen while the
    # slope statistic is above half its threshold or the level statistic above HOT_LEVEL (a
    # change building up would inflate it), and for HOLD rows after an alarm (_hold); no
    # winsorizing before min_rows rows (the scale is not yet known)
    if st[at + D_HOT] > 0.0:
        st[at + D_HOT] -= 1.0
    else:
        w = lam * st[at + D_W] + 1.0
        iw = 1.0 / w
        st[at + D_W] = w
        mx = st[at + D_MX] + (x - st[at + D_MX]) * iw
        st[at + D_MX] = mx
        xc = x - mx
        s2 = st[at + D_S2]
        ec = e
        if s2 > 0.0 and st[at + D_NF] >= p[Q_MINROWS]:
            # the row's own variance where it depends on the price (weights 1; with working
            # weights the weights carry it), never below the average: _row_var
            lim = WINSOR_C * np.sqrt((s2 if weighted else _row_var(st, at, x)) / WINSOR_K)
            if ec > lim:
                ec = lim
            elif ec < -lim:
                ec = -lim
        elif weighted:
            # Pearson residuals have a known scale under the model (phi = 1 for Poisson
            # counts), so they are winsorized from the first row at 4 x max(that, the scale so
            # far): the estimator's first predictions after its warm-up can be far off (a
            # count of 2 on a predicted 0.06 is a residual of 7.9), and one such square kept
            # the scale about 1.8x too large for the first hundred rows (measured)
            lim = WINSOR_C * np.sqrt(max(s2, 1.0) / WINSOR_K)
            if ec > lim:
                ec = lim
            elif ec < -lim:
                ec = -lim
        # the slope score sqrt(wt) xc ec and the information wt xc^2 (weights 1: xc ec, xc^2)
        u = (np.sqrt(wt) * xc) * ec
        st[at + D_S2] = s2 + (ec * ec - s2) * iw
        if st[at + D_NF] > 0.0:
            st[at + D_E1] += (ec * st[at + D_PE] - st[at + D_E1]) * iw
            st[at + D_U1] += (u * st[at + D_PU] - st[at + D_U1]) * iw
        st[at + D_UU] += (u * u - st[at + D_UU]) * iw
        st[at + D_XX] += (wt * xc * xc - st[at + D_XX]) * iw
        if weighted:
            # the row unit: EW mean of the weights (a value left by an earlier layout, or
            # none yet, is replaced by this row's weight)
            c = st[at + D_HX]
            st[at + D_HX] = c + (wt - c) * iw if c > 0.0 else wt
        else:
            st[at + D_HX] += (xc * ec * ec - st[at + D_HX]) * iw
        st[at + D_PE] = ec
        st[at + D_PU] = u
        # the prices' own lag-1 moment (its own EW weight: PX_W)
        pc = np.sqrt(wt) * xc
        if st[at + PX_ON] != 0.0:
            wx = lam * st[at + PX_W] + 1.0
            st[at + PX_W] = wx
            st[at + PX_1] += (pc * st[at + PX_P] - st[at + PX_1]) / wx
        st[at + PX_P] = pc
        st[at + PX_ON] = 1.0
    st[at + D_NF] += 1.0
    unit = row_unit(st, at, p)
    cap = p[Q_CAP] * unit
    # --- checkpoints (cascade), then the row enters the current sums
    t = st[at + D_T] + 1.0
    st[at + D_T] = t
    ti = int(t)
    moved = False
    kz = _kz(st, at)
    for j in range(NSLOT - 1, 0, -1):
        if ti % (1 << j) == 0:
            q = at + SLOT0 + SLOT_W * j
            r = q - SLOT_W
            for m in range(SLOT_W):
                st[q + m] = st[r + m]
            if kz > 0:
                _zs_copy(st, _zs_slot(at, j), _zs_slot(at, j - 1), kz)
            if j < NHX:
                st[at + HX_SLOT + 2 * j] = st[at + HX_SLOT + 2 * j - 2]
                st[at + HX_SLOT + 2 * j + 1] = st[at + HX_SLOT + 2 * j - 1]
            if j == NSLOT - 1:
                moved = True
    q = at + SLOT0
    for m in range(5):
        st[q + m] = st[at + C0 + m]
    st[q + 5] = ts
    st[at + HX_SLOT] = st[at + HX_C]
    st[at + HX_SLOT + 1] = st[at + HX_C + 1]
    if kz > 0:
        _zs_copy(st, _zs_slot(at, 0), at + ZS_CW, kz)
    if moved:  # data older than the new window start join the reference
        if kz > 0:
            _zs_axpy(st, at + ZS_R, _zs_slot(at, NSLOT - 1), 1.0, kz)
        n, sx, sxx, sy, sxy = _rebase(st, at, NSLOT - 1)
        _add_ref(st, at, n, sx, sxx, sy, sxy, cap)
    st[at + C0] += wt
    st[at + C0 + 1] += wt * x
    st[at + C0 + 2] += wt * x * x
    st[at + C0 + 3] += wt * y
    st[at + C0 + 4] += wt * x * y
    for k in range(kz):              # the row's controls (ZS_ROW, written by the caller)
        zk = st[at + ZS_ROW + k]
        st[at + ZS_CW + k] += wt * zk
        st[at + ZS_CW + NCF + k] += wt * x * zk
    x3 = wt * x * x * x
    st[at + HX_C] += x3
    st[at + HX_C + 1] += x3 * x
    # --- start rules
    s2, kap, rs, rl = _scales(st, at)
    _al_step(st, at, e, s2)
    flags = SG_FED
    if st[at + D_NF] < p[Q_MINROWS] or not (s2 > 0.0):
        return flags
    if st[at + D_ON_L] == 0.0 and p[Q_LEVEL_ON] != 0.0:
        st[at + D_ON_L] = 1.0
        _restart(st, at, ts, cap)
        return flags
    if st[at + D_ON_S] == 0.0 and p[Q_SLOPE_ON] != 0.0:
        tn = st[at + R0] + st[at + C0]
        _, _, cxx, _ = _moments(tn, st[at + R0 + 1] + st[at + C0 + 1],
                                st[at + R0 + 2] + st[at + C0 + 2],
                                st[at + R0 + 3] + st[at + C0 + 3],
                                st[at + R0 + 4] + st[at + C0 + 4])
        cxx += st[at + L0 + 1]
        if cxx > 0.0 and s2 * kap * _lrf(rs, tn / unit) / cxx <= p[Q_SESTART] * p[Q_SESTART]:
            st[at + D_ON_S] = 1.0
            _restart(st, at, ts, cap)
            return flags
    # --- the statistics
    gs_max = 0.0
    gl_max = 0.0
    gl_any = 0.0
    gl_js = 0.0
    gl0_jl = 0.0
    gp_any = 0.0
    js = -1.0
    jl = -1.0
    prev_n = -1.0
    for j in range(NSLOT):
        nj = st[at + SLOT0 + SLOT_W * j]
        if nj == prev_n:
            continue
        prev_n = nj
        gs, gl, na, nb, gl0, gp = _candidate(st, at, j, s2, kap, rs, rl, p[Q_MIN_WEIGHT_S],
                                             unit, weighted)
        if gs > gs_max:
            gs_max = gs
            js = j
            gl_js = max(gl, 0.0)
        if gl > gl_any:
            gl_any = gl
        if gp > gp_any:
            gp_any = gp
        if na >= MIN_AFTER_LEVEL * unit and nb >= MIN_BEFORE_LEVEL * unit and gl > gl_max \
                and na >= p[Q_MIN_WEIGHT]:
            gl_max = gl
            jl = j
            gl0_jl = gl0
    # the level-only alternatives at the CUSUMs' change times (module docstring, "Labels"):
    # a level shift between two checkpoints is otherwise explained by an older checkpoint's
    # slope across a price change; only where that level change is itself significant
    gl_al = _al_level(st, at, s2, kap, rs, rl, unit, weighted)
    if gl_al > p[Q_HL] and gl_al > gl_any:
        gl_any = gl_al
    if st[at + D_ON_S] == 0.0:
        gs_max = 0.0
        js = -1.0
    if st[at + D_ON_L] == 0.0:
        gl_max = 0.0
        jl = -1.0
    # a slope alarm needs the full (level + slope) GLR at its change time to beat the best
    # level-only GLR at any change time by MARGIN; else a level step inside the after sample
    # (which biases its slope) is the better explanation, and the level chart decides first.
    # The level-only alternatives include those that may not alarm themselves (gl_any: one
    # or two rows after the change time, or fewer than min_rows before it, as just after a
    # level alarm): the first rows of a large level shift, at a held price, otherwise tilt
    # the slope of a short after sample and raised a slope alarm at the shift's first row
    # (measured: 53 of 400 series with a -50% shift under step prices, ARL0 2,000).
    # D_GS holds the statistic compared with h_s: G_s where the margin holds, else 0.
    hot = gs_max > p[Q_HOTS] or gl_max > p[Q_HOTL]
    if gs_max + gl_js - max(gl_max, gl_any) < p[Q_SMARGIN]:
        gs_max = 0.0
    # and a level alarm needs the level-only change at its time to beat every slope-only
    # change (pivoting at the before sample's mean price) by MARGIN (likelihood ratio of two
    # non-nested one-parameter models, Vuong 1989: below the margin the data do not tell them
    # apart and neither label is earned yet). With a price held since the change the two are
    # tied exactly, so a pure slope change under step prices no longer opens a level_shift
    # first (measured before, ARL0 2,000: level_shift first in 42-65% of them); the slope
    # chart decides once the after sample's prices move.
    # While the level chart is over its threshold and neither explanation has won (the price
    # has not moved since the change), the slope chart waits too: its candidates older than
    # the change would otherwise explain the level step between their pre-change rows and the
    # held price by a slope (the checkpoints are log-spaced, so the level-only alternative is
    # not available at the change time itself) and open elasticity_change on a level shift
    # (measured: first alarm after a -50% shift under held prices elasticity_change in 17 of
    # 100 series without this wait).
    if gl_max > p[Q_HL] and gp_any - gl0_jl < p[Q_LMARGIN]:
        gs_max = 0.0
    if gl0_jl - gp_any < p[Q_LMARGIN]:
        gl_max = 0.0
    st[at + D_GS] = gs_max
    st[at + D_GL] = gl_max
    st[at + D_JS] = js
    st[at + D_JL] = jl
    level = gl_max > p[Q_HL]
    if gs_max > p[Q_HS] and not level:
        flags |= SG_SLOPE
    if level:
        flags |= SG_LEVEL
    # while a change is building up, its residuals would inflate the scale: freeze it
    if hot:
        st[at + D_HOT] = max(st[at + D_HOT], 1.0)
    return flags


@njit(cache=True, inline="always")
def split_report(st, at, slope, n_obs, out, p):
    """Fill ``out`` (:data:`REPORT_SIZE`) for the last alarm of the slope (``slope`` True) or
    level chart: the change time, the rows since it, b before / after with standard errors
    (sigma_s scale) and degrees of freedom, the level change ``d`` (log scale) with its se,
    and the statistic."""
    unit = row_unit(st, at, p)
    j = int(st[at + (D_JS if slope else D_JL)])
    for i in range(REPORT_SIZE):
        out[i] = np.nan
    if j < 0:
        return
    o = at + SLOT0 + SLOT_W * j
    s2, kap, rs, rl = _scales(st, at)
    na = st[at + C0] - st[o]
    mxa, mya, cxa, cya, nb, mxb, myb, cxb, cyb = _samples(st, at, o, na)
    out[RP_TS] = st[o + 5]
    out[RP_NA] = _nrows(na, unit)
    nbs = nb + st[at + L0]
    if cxb > 0.0:
        out[RP_BB] = cyb / cxb
        out[RP_BB_SE] = np.sqrt(s2 * kap * _lrf(rs, nbs / unit) / cxb)
    if cxa > 0.0 and na >= 2.0 * unit:
        out[RP_BA] = cya / cxa
        out[RP_BA_SE] = np.sqrt(s2 * kap * _lrf(rs, na / unit) / cxa)
    cx = cxa + cxb
    dx = mxa - mxb
    bw = (cya + cyb) / cx if cx > 0.0 else 0.0
    if nb > 0.0 and na > 0.0:
        out[RP_LEVEL] = mya - myb - bw * dx
        out[RP_LEVEL_SE] = np.sqrt(s2 * (_lrf(rl, na / unit) / na + _lrf(rl, nb / unit) / nb)
                                   + s2 * kap * (dx * dx / cx if cx > 0.0 else 0.0))
    out[RP_STAT] = st[at + (D_GS if slope else D_GL)]
    out[RP_DFB] = (nb + st[at + L0]) / unit - 2.0
    out[RP_DFA] = na / unit - 2.0


@njit(cache=True, inline="always")
def after_fit(st, at, slope, p):
    """``(n_A, a, b)`` of the after sample of the last alarm's checkpoint in raw ``log p``
    coordinates (``y* = a + b log p``; ``n_A`` in rows), before re-anchoring; NaN where
    undefined."""
    unit = row_unit(st, at, p)
    j = int(st[at + (D_JS if slope else D_JL)])
    if j < 0:
        return 0.0, np.nan, np.nan
    o = at + SLOT0 + SLOT_W * j
    na = st[at + C0] - st[o]
    mxa, mya, cxa, cya = _moments(na, st[at + C0 + 1] - st[o + 1], st[at + C0 + 2] - st[o + 2],
                                  st[at + C0 + 3] - st[o + 3], st[at + C0 + 4] - st[o + 4])
    if na < 2.0 * unit or not (cxa > 0.0):
        return _nrows(na, unit), np.nan, np.nan
    b = cya / cxa
    return _nrows(na, unit), mya - b * (mxa + st[at + D_X0]), b


@njit(cache=True, inline="always")
def _clear_window(st, at):
    """Empty the current sums and every checkpoint (their time: the latest checkpoint's)."""
    ts = st[at + SLOT0 + 5]
    for i in range(5):
        st[at + C0 + i] = 0.0
    if st[at + CFIT_ON] != 0.0:          # the controls' sums (only with the control fit on)
        _zs_zero(st, at + ZS_CW)
        for i in range(NSLOT):
            _zs_zero(st, _zs_slot(at, i))
    for i in range(NSLOT):
        q = at + SLOT0 + SLOT_W * i
        for m in range(5):
            st[q + m] = 0.0
        st[q + 5] = ts
    st[at + D_T] = 0.0
    _clear_hx(st, at)
    _al_reset(st, at)


@njit(cache=True, inline="always")
def _retire_level(st, at, n, sx, sxx, sy, sxy, za, zb, zsign):
    """Add a sample's centred sums to the level-free part L (it keeps its slope information
    under its own intercept); its controls' sums are ``za + zsign zb`` (sum sets at offsets
    ``za``, ``zb``), whose centred ``sum (x - xbar)(z - zbar)`` join L's."""
    if n <= 0.0:
        return
    _, _, cxx, cxy = _moments(n, sx, sxx, sy, sxy)
    st[at + L0] += n
    st[at + L0 + 1] += cxx
    st[at + L0 + 2] += cxy
    for k in range(_kz(st, at)):
        sz = st[za + k] + zsign * st[zb + k]
        sxz = st[za + NCF + k] + zsign * st[zb + NCF + k]
        st[at + ZS_L + k] += sxz - sx * sz / n


@njit(cache=True, inline="always")
def _hold(st, at):
    """After an alarm: the scale is held for :data:`HOLD` rows, once it rests on
    :data:`FREEZE_MIN_W` of weight (before that only a hot statistic freezes it)."""
    if st[at + D_W] >= FREEZE_MIN_W:
        st[at + D_HOT] = HOLD


@njit(cache=True, inline="always")
def reanchor_slope(st, at, p):
    """After a slope alarm: every sum is dropped and the slope chart waits for the start rule
    on new data; the level chart's candidates need ``min_rows`` new rows.

    The after sample is *not* kept as the new reference: it is the sample that looked most
    extreme (selected by the maximum), so its slope overshoots the new regime, and a
    reference built on it would raise a second alarm as later data regress to the truth
    (measured: a follow-on alarm within a few hundred rows after most alarms)."""
    _clear_window(st, at)
    for i in range(5):
        st[at + R0 + i] = 0.0
    for i in range(3):
        st[at + L0 + i] = 0.0
    if st[at + CFIT_ON] != 0.0:
        _zs_zero(st, at + ZS_R)
        for k in range(NCF):
            st[at + ZS_L + k] = 0.0
        # every sum is empty: the controls' sums are complete from here (a state restored
        # from the layout without them, flag 0, turns them on; the caller sets kz and c at
        # the next row)
        st[at + ZS_ON] = 1.0
    st[at + D_ON_S] = 0.0
    st[at + D_GS] = 0.0
    st[at + D_GL] = 0.0
    _hold(st, at)


@njit(cache=True, inline="always")
def reanchor_level(st, at, p):
    """After a level alarm at checkpoint ``j``. A strong alarm (an aligned candidate's level
    statistic at least :data:`KEEP_LEVEL` times the level threshold): the rows before that
    candidate's change time keep their slope information but not their level (centred sums
    into L), the rows since it stay in the window with their level (:func:`_rebase_al`), so
    the slope chart tests a change of b at that time with every row of the new regime. A
    weak one: the data before and after the change time keep their slope information, each
    under its own intercept, but not their level (the after sample's level is selected, as
    in :func:`reanchor_slope`). Either way the slope chart continues against the old slope
    (module docstring, "Start rule and re-anchoring")."""
    j = int(st[at + D_JL])
    if j < 0:
        return
    # a strong alarm keeps the rows since its data-placed change time, with their level
    s2, kap, rs, rl = _scales(st, at)
    unit = row_unit(st, at, p)
    dbest = -1
    gbest = KEEP_LEVEL * p[Q_HL]
    for d in range(NAL):
        b = at + AL0 + AL_W * d
        if st[b + 1] == 0.0 or st[at + C0] - st[b + 2] < MIN_AFTER_LEVEL * unit:
            continue
        gl = _level_o(st, at, b + 2, s2, kap, rs, rl, unit, p[Q_WEIGHTED] != 0.0)
        if gl > gbest:
            gbest = gl
            dbest = d
    if dbest >= 0:
        b = at + AL0 + AL_W * dbest
        _retire_level(st, at, st[at + R0] + st[b + 2], st[at + R0 + 1] + st[b + 3],
                      st[at + R0 + 2] + st[b + 4], st[at + R0 + 3] + st[b + 5],
                      st[at + R0 + 4] + st[b + 6], at + ZS_R, _al_zs(at, dbest), 1.0)
        for i in range(5):
            st[at + R0 + i] = 0.0
        if st[at + CFIT_ON] != 0.0:
            _zs_zero(st, at + ZS_R)
        _rebase_al(st, at, dbest)
        st[at + D_GL] = 0.0
        st[at + D_GS] = 0.0
        _hold(st, at)
        return
    o = at + SLOT0 + SLOT_W * j
    zj = _zs_slot(at, j)
    _retire_level(st, at, st[at + R0] + st[o], st[at + R0 + 1] + st[o + 1],
                  st[at + R0 + 2] + st[o + 2], st[at + R0 + 3] + st[o + 3],
                  st[at + R0 + 4] + st[o + 4], at + ZS_R, zj, 1.0)
    _retire_level(st, at, st[at + C0] - st[o], st[at + C0 + 1] - st[o + 1],
                  st[at + C0 + 2] - st[o + 2], st[at + C0 + 3] - st[o + 3],
                  st[at + C0 + 4] - st[o + 4], at + ZS_CW, zj, -1.0)
    _clear_window(st, at)
    for i in range(5):
        st[at + R0 + i] = 0.0
    if st[at + CFIT_ON] != 0.0:
        _zs_zero(st, at + ZS_R)
    st[at + D_GL] = 0.0
    st[at + D_GS] = 0.0
    _hold(st, at)


def split_statistics(before, after, s2: float = 1.0, weighted: bool = True) -> dict:
    """The statistics of one candidate change time from the (weighted) sums ``(n, Sx, Sxx, Sy,
    Sxy)`` of the samples before and after it, the error variance ``s2`` known (no sandwich
    factor, no autocorrelation): ``slope`` (``G_s``), ``level`` (``G_l``), ``level_only`` and
    ``pivot`` (:func:`_level_vs_pivot`), in log-likelihood-ratio units.

    With the rows' working weights ``w = mu`` and working responses ``z = eta + (q - mu) / mu``
    at the Poisson maximum-likelihood fit without a change, ``2 G`` is the score statistic of
    the Poisson regression with the change's regressor added (level: ``1_A``; slope: ``1_A x``
    beside ``1_A``; pivot: ``1_A (x - xbar_B)``): one Fisher-scoring step from the null fit is
    a weighted least-squares fit of ``z`` (McCullagh & Nelder 1989, sec. 2.5), and its
    sums-of-squares reduction is Rao's score statistic (checked against statsmodels in
    tests/test_split_poisson.py). ``weighted``: as :func:`params`."""
    st = np.zeros(SPLIT_SIZE)
    st[R0:R0 + 5] = np.asarray(before, dtype=np.float64)     # before = R + slot 0 (empty)
    st[C0:C0 + 5] = np.asarray(after, dtype=np.float64)      # after = C - slot 0
    gs, gl, _, _, gl0, gp = _candidate(st, 0, 0, float(s2), 1.0, 0.0, 0.0, 0.0, 1.0,
                                       bool(weighted))
    return {"slope": float(gs), "level": float(gl), "level_only": float(gl0),
            "pivot": float(gp)}


@njit(cache=True, inline="always")
def info_per_obs(st, at, db):
    """Information per observation about a slope change ``db``: ``db^2 Var(x) / (2 sigma_s^2)``
    (Kullback-Leibler, normal errors; Var(x) the EW variance of log price). NaN before any
    scale."""
    s2, kap, rs, _ = _scales(st, at)
    vx = st[at + D_XX]
    if not (s2 > 0.0) or not (vx >= 0.0):
        return np.nan
    return db * db * vx / (2.0 * s2 * kap * (1.0 + rs) / (1.0 - rs))

