"""The split GLR's controls' sums (monitor.detectors.split_glr, "The controls' sums"; issue 16).

The detector's response sums hold ``y* = log q - c' z`` with the control fit's *current* ``c``
for every row (not the ``c`` the fit had when the row came): checked against the same sums
computed directly with the least-squares coefficients of all rows (statsmodels OLS, with the
regime intercept a level alarm gives the fit), through the chart starts, the checkpoint
cascade and a level re-anchoring (the level-free part L). A state of the layout without the
controls' sums restores with them off and turns them on when a slope alarm drops every sum.
"""

from __future__ import annotations

import numpy as np
import statsmodels.api as sm

from monitor.detectors import split_controls as SC
from monitor.detectors import split_glr as SG
from monitor.estimators import ElasticityRLS
from monitor.estimators import kernel as K
from monitor.pipeline.run import L_SPLIT, Pipeline
from tests.pipeline_helpers import restores_without_block


def _rows(rng, n):
    """Hourly-load-like rows: a block dummy that sets part of the price (collinear with log
    price) and a heating-degree control that drifts down over the rows."""
    hour = np.arange(n) % 24
    block = ((hour >= 17) & (hour < 22)).astype(float)
    hdd = np.maximum(6.0 - 4.0 * np.arange(n) / n + rng.normal(0.0, 2.0, n), 0.0)
    x = 0.5 * block + np.log(rng.choice([0.8, 0.9, 1.0, 1.12, 1.25], n))
    y = 3.0 - 0.2 * x + 0.45 * block + 0.035 * hdd + rng.normal(0.0, 0.05, n)
    return x, np.column_stack([hdd, block]), y


def _feed(st, x, z, y, p, first, last, work):
    """Rows ``first..last - 1`` through the pipeline's two steps (control fit, detector)."""
    est = np.zeros(64)
    fed = []
    for j in range(first, last):
        xj = np.r_[1.0, x[j], z[j]]
        ys, ready = SC.fit_response(st, 0, xj, y[j], 4, est, work, 0, np.nan)
        if ready:
            SG.split_step(st, 0, x[j], ys, 0.05 * ((j * 7919) % 13 - 6) / 6, float(j),
                          float(j), p)
            fed.append(j)
    return fed


def _sums(x, ys, x0):
    xc = x - x0
    return np.array([len(x), xc.sum(), (xc * xc).sum(), ys.sum(), (xc * ys).sum()])


def test_the_response_sums_hold_every_row_with_the_fits_current_coefficients():
    # fails with the response sums of the layout before (each row's y* kept the c the fit had
    # when it came, which moves with the young fit: by 1e-2 of log q here)
    rng = np.random.default_rng(16)
    n = 1500
    x, z, y = _rows(rng, n)
    st = np.zeros(SG.SPLIT_SIZE)
    work = np.zeros(SC.SCRATCH)
    p = SG.params(1e9, 1e9)                                     # no alarms
    fed = _feed(st, x, z, y, p, 0, n, work)
    assert 50 < fed[0] < 400 and fed[-1] == n - 1               # identified, then every row
    c = sm.OLS(y, np.column_stack([np.ones(n), x, z])).fit().params
    ys = y - z @ c[2:]
    want = _sums(x, ys, x[fed[0]])                              # seeded rows and fed rows
    got = st[SG.R0:SG.R0 + 5] + st[SG.C0:SG.C0 + 5]             # R + C: every row (no cap)
    np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-8)
    # and every checkpoint's after sample (C minus the checkpoint): the rows since it
    for j in range(SG.NSLOT):
        o = SG.SLOT0 + SG.SLOT_W * j
        na = int(round(st[SG.C0] - st[o]))
        if na == 0:
            continue
        rows = slice(n - na, n)
        np.testing.assert_allclose(st[SG.C0:SG.C0 + 5] - st[o:o + 5],
                                   _sums(x[rows], ys[rows], x[fed[0]]), rtol=1e-8, atol=1e-7)


def test_after_a_level_realignment_the_level_free_sums_follow_the_coefficients():
    rng = np.random.default_rng(17)
    n, r = 1400, 900
    x, z, y = _rows(rng, n)
    y[r:] += 0.1
    st = np.zeros(SG.SPLIT_SIZE)
    work = np.zeros(SC.SCRATCH)
    p = SG.params(1e9, 1e9)
    fed = _feed(st, x, z, y, p, 0, r, work)
    x0 = x[fed[0]]
    # a level alarm at row r - 1 whose change time is checkpoint 4's (as the pipeline
    # re-anchors: split_events.split_reanchor)
    st[SG.D_JL] = 4.0
    na = int(round(st[SG.C0] - st[SG.SLOT0 + SG.SLOT_W * 4]))
    assert 8 <= na <= 32
    SG.reanchor_level(st, 0, p)
    SC.fit_partial(st, SG.CFIT0, 0)
    _feed(st, x, z, y, p, r, n, work)
    # statsmodels: one intercept per regime of the fit (rows < r, rows >= r)
    d = (np.arange(n) >= r).astype(float)
    c = sm.OLS(y, np.column_stack([1.0 - d, d, x, z])).fit().params
    ys = y - z @ c[3:]
    cxy = 0.0
    for rows in (slice(0, r - na), slice(r - na, r)):          # the two retired samples
        xs = x[rows] - x0
        cxy += ((xs - xs.mean()) * ys[rows]).sum()
    np.testing.assert_allclose(st[SG.L0 + 2], cxy, rtol=1e-9, atol=1e-9)
    got = st[SG.R0:SG.R0 + 5] + st[SG.C0:SG.C0 + 5]             # rows since the re-anchoring
    np.testing.assert_allclose(got, _sums(x[r:], ys[r:], x0), rtol=1e-9, atol=1e-8)


def _run():
    pipe = Pipeline(ElasticityRLS(forgetting=0.99, controls=["hdd", "peak"]))
    rng = np.random.default_rng(5)
    x, z, y = _rows(rng, 900)
    X = np.column_stack([np.ones(len(x)), x, z])
    return pipe, X, y


def test_a_state_without_the_controls_sums_resumes_with_them_off_until_a_slope_alarm():
    pipe, X, y = _run()
    res = pipe.run(np.zeros(600, np.int64), X[:600], y[:600], 1)
    row = res.states[0]
    at = int(pipe._layout[L_SPLIT])
    az = at + SG.ZS0
    assert row[at + SG.CFIT_ON] == 1.0 and row[az] == 1.0 and row[at + SG.ZS_K] == 2.0
    # the layout before (it had no aligned level candidates nor the prices' lag-1 moments
    # either: they sit just before)
    up = restores_without_block(pipe, row, at + SG.AL0, SG.AL_SIZE + SG.PX_SIZE + SG.ZS_SIZE)
    # it runs on with the sums off (the response sums keep each row's c, as before) ...
    more = pipe.run(np.zeros(300, np.int64), X[600:], y[600:], 1, states=up[None, :].copy())
    assert np.all(np.isfinite(more.out[:, K.O_BETA]))
    assert more.states[0, az] == 0.0 and np.all(more.states[0, az:az + SG.ZS_SIZE] == 0.0)
    # ... until a slope alarm drops every sum: then they start, for the series' 2 controls
    st = up.copy()
    SG.reanchor_slope(st, at, SG.params(1.0, 1.0))
    assert st[az] == 1.0
    again = pipe.run(np.zeros(300, np.int64), X[600:], y[600:], 1, states=st[None, :].copy())
    s2 = again.states[0]
    assert s2[at + SG.ZS_K] == 2.0
    assert np.any(s2[at + SG.ZS_CW:at + SG.ZS_CW + 2] != 0.0)
    work = np.zeros(SC.SCRATCH)
    SC.fit_solve(s2, at + SG.CFIT0, work, 0, 2)
    np.testing.assert_allclose(s2[at + SG.ZS_C:at + SG.ZS_C + 2],
                               work[SC.M * SC.M + 2:SC.M * SC.M + 4], rtol=1e-12)


def test_only_a_pipeline_whose_rows_have_controls_carries_the_controls_sums():
    with_c, _, _ = _run()
    plain = Pipeline(ElasticityRLS(forgetting=0.99))
    a, b = with_c.layout()["split"], plain.layout()["split"]
    assert a[1] - a[0] == SG.SPLIT_SIZE and b[1] - b[0] == SG.ZS0
    # without controls a state of the layout before is this layout: it resumes as it is
    rng = np.random.default_rng(3)
    x = rng.normal(0.0, 0.15, 700)
    y = 2.0 - np.where(np.arange(700) < 400, 1.0, 1.8) * x + rng.normal(0.0, 0.1, 700)
    X = np.column_stack([np.ones(700), x])
    res = plain.run(np.zeros(700, np.int64), X, y, 1)
    assert np.array_equal(plain.checked_state(res.states[0]), res.states[0], equal_nan=True)


def test_the_aligned_candidates_sums_hold_their_rows_with_the_fits_current_coefficients():
    """The aligned level candidates (split_glr, "Labels") keep their controls' sums and are
    re-expressed with the fit's ``c`` like the checkpoints: after every row each set
    candidate's after sample (the window's sums less its own) equals the sums of the rows
    since its change time with ``y* = log q - c' z``, ``c`` the least-squares coefficients of
    all rows so far (numpy lstsq). A +2 sd level shift 1,100 rows before the end keeps the
    upward k = 0.5 CUSUM's candidate at the shift across a move of the window start.
    Fails if zs_express skips the candidates (Sy, Sxy off by up to 0.30 here) or the move of
    the window start skips their controls' sums (0.13), or without those sums (main before 5
    December)."""
    rng = np.random.default_rng(18)
    n, r = 2600, 1500
    x, z, y = _rows(rng, n)
    y[r:] += 0.1
    st = np.zeros(SG.SPLIT_SIZE)
    work = np.zeros(SC.SCRATCH)
    est = np.zeros(64)
    p = SG.params(1e9, 1e9)                                     # no alarms
    A = np.column_stack([np.ones(n), x, z])
    x0 = None
    checked = across = 0
    for j in range(n):
        xj = np.r_[1.0, x[j], z[j]]
        ys, ready = SC.fit_response(st, 0, xj, y[j], 4, est, work, 0, np.nan)
        if not ready:
            continue
        x0 = x[j] if x0 is None else x0
        e = y[j] - (3.0 - 0.2 * x[j] + 0.45 * z[j, 1] + 0.035 * z[j, 0])   # shift stays in e
        SG.split_step(st, 0, x[j], ys, e, float(j), float(j), p)
        if j < r - 50 or j % 7:
            continue
        c = np.linalg.lstsq(A[:j + 1], y[:j + 1], rcond=None)[0]
        yst = y[:j + 1] - z[:j + 1] @ c[2:]
        for d in range(SG.NAL):
            b = SG.AL0 + SG.AL_W * d
            if st[b + 1] == 0.0:
                continue
            na = int(round(st[SG.C0] - st[b + 2]))
            if na < 2:
                continue
            rows = slice(j + 1 - na, j + 1)
            np.testing.assert_allclose(st[SG.C0:SG.C0 + 5] - st[b + 2:b + 7],
                                       _sums(x[rows], yst[rows], x0), rtol=1e-8, atol=1e-7)
            checked += 1
            across += na > int(st[SG.D_T]) % 1024          # taken before the window moved
    assert checked > 100 and across > 20


def test_a_state_saved_before_the_aligned_candidates_controls_sums_resumes():
    """A state of the layout before the aligned candidates' controls' sums (main before 5
    December: ``AL_ZS_SIZE`` floats fewer at the end of the controls' sums; and the one before
    the aligned candidates as well) restores with those sums zero and the candidates unset,
    everything else as it was, and runs on; each candidate comes back when its CUSUM next
    resets, with its controls' sums taken from the window's."""
    pipe, X, y = _run()
    res = pipe.run(np.zeros(600, np.int64), X[:600], y[:600], 1)
    row = res.states[0]
    at = int(pipe._layout[L_SPLIT])
    al, zal, px = at + SG.AL0, at + SG.ZS_AL, at + SG.PX0
    flags = slice(al + 1, al + SG.AL_SIZE, SG.AL_W)
    assert np.all(row[flags] == 1.0) and np.any(row[zal:zal + SG.AL_ZS_SIZE] != 0.0)
    # (that layout had no prices' lag-1 moments either)
    old = np.concatenate([row[:px], row[px + SG.PX_SIZE:zal], row[zal + SG.AL_ZS_SIZE:]])
    up = pipe.checked_state(old)
    assert np.array_equal(pipe.state_from_json(pipe.state_to_json(old)), up, equal_nan=True)
    want = row.copy()
    want[zal:zal + SG.AL_ZS_SIZE] = 0.0
    want[px:px + SG.PX_SIZE] = 0.0
    want[flags] = 0.0
    assert np.array_equal(up, want, equal_nan=True)
    more = pipe.run(np.zeros(300, np.int64), X[600:], y[600:], 1, states=up[None, :].copy())
    assert np.all(np.isfinite(more.out[:, K.O_BETA]))
    s2 = more.states[0]
    assert np.all(s2[flags] == 1.0)
    assert np.any(s2[zal:zal + SG.AL_ZS_SIZE] != 0.0)
    # the layout before the aligned candidates (with the controls' sums of then): both
    # blocks come in as zeros, the rest as it was
    older = np.concatenate([row[:al], row[px + SG.PX_SIZE:zal], row[zal + SG.AL_ZS_SIZE:]])
    up2 = pipe.checked_state(older)
    want[al:al + SG.AL_SIZE] = 0.0
    assert np.array_equal(up2, want, equal_nan=True)


def test_a_streaming_detector_saved_before_the_aligned_candidates_controls_sums_resumes():
    # the streaming class has no controls: a state of main's layout before 5 December
    # (AL_ZS_SIZE floats fewer) comes back with those sums as zeros, the rest exactly
    from monitor.detectors.split_class import SplitGLR
    rng = np.random.default_rng(7)
    det = SplitGLR(arl0=20000)
    for i in range(300):
        x = rng.normal(0.0, 0.15)
        det.update(x, 2.0 - x + rng.normal(0.0, 0.1), rng.normal(0.0, 0.1), ts=float(i))
    saved = det.to_state()
    full = np.array(saved["state"], dtype=float)
    assert np.all(full[SG.ZS_AL:] == 0.0)
    # (nor the prices' lag-1 moments)
    old = np.concatenate([full[:SG.PX0], full[SG.ZS0:SG.ZS_AL]])
    back = SplitGLR.from_state(dict(saved, state=list(old)))
    want = full.copy()
    want[SG.PX0:SG.ZS0] = 0.0
    assert np.array_equal(back._state, want, equal_nan=True)
    assert back.update(0.01, 2.0, 0.0, ts=300.0) is not None
