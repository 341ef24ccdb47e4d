"""Arrow-backed text: validation's C number parse gives today's values and rejects to the bit.

:func:`monitor.rows.validate.parse_numbers` parses an Arrow text column with
``pyarrow.compute.cast`` when every field is a finite number; otherwise (and before this path
existed) it takes the ``pd.to_numeric`` path. "Old" below is that path, forced by switching the
Arrow parse off. The outside reference is CPython's ``float()`` (correctly rounded decimal to
binary conversion, Python documentation, "Floating Point Arithmetic"; Clinger 1990).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

import monitor.rows.validate as V
from monitor.rows.validate import parse_numbers, validate_frame


def _old(monkeypatch, fn, *args, **kw):
    """``fn(*args, **kw)`` with the Arrow number parse switched off (the path of before)."""
    with monkeypatch.context() as m:
        m.setattr(V, "_arrow_numbers", lambda col: None)
        return fn(*args, **kw)


def _texts(rng, n: int, plus: bool = False) -> list[str]:
    """Random number texts: %.{1..17}g over the whole float64 range, repr round-trips,
    subnormals, the largest float64, long integers, blanks around; a leading '+' on some
    when ``plus``."""
    e = rng.uniform(-323.5, 308.2, n)
    x = np.sign(rng.uniform(-1, 1, n)) * 10.0 ** e
    x = np.where(np.isfinite(x) & (x != 0), x, 1.5)
    digits = rng.integers(1, 18, n)
    kind = rng.integers(0, 6, n)
    out = []
    for xi, d, k in zip(x.tolist(), digits.tolist(), kind.tolist()):
        if k == 0:
            t = f"%.{d}g" % xi
        elif k == 1:
            t = repr(xi)
        elif k == 2:                 # subnormal
            t = repr(float(np.float64(5e-324) * int(rng.integers(1, 2**52))))
        elif k == 3:                 # integers of 1 .. 30 digits
            t = str(int(rng.integers(1, 10))) + "".join(map(str, rng.integers(0, 10, int(rng.integers(0, 30)))))
        elif k == 4:
            t = f"%.{d}e" % xi
        else:
            t = f"{xi:.{d}f}" if abs(xi) < 1e20 and abs(xi) > 1e-5 else f"%.{d}g" % xi
        if t.startswith("-0") and float(t) == 0:
            t = "1" + t[2:]          # -0 is left to the general path (checked below)
        if plus and rng.random() < 0.1 and not t.startswith("-"):
            t = "+" + t
        if rng.random() < 0.1:
            t = " " * int(rng.integers(1, 3)) + t + "\t" * int(rng.integers(0, 2))
        out.append(t)
    out += ["1.7976931348623157e308", "-1.7976931348623157e308", "4.9e-324", "5e-324",
            "2.2250738585072014e-308", "2.225073858507201e-308", "9007199254740993",
            "123456789012345678901234567890", "0", "0.0", "  7  ", ".5", "5.", ".5e-3"]
    return out + (["+0", "+.5e-3", " +1.052e+119"] if plus else [])


def _bits(v: np.ndarray) -> np.ndarray:
    return np.asarray(v, dtype=np.float64).view(np.int64)


@pytest.mark.parametrize("dtype", ["string[pyarrow]", "str", pd.ArrowDtype(pa.large_string())])
def test_random_number_texts_bit_identical(monkeypatch, dtype):
    rng = np.random.default_rng(20261204)
    texts = _texts(rng, 4000)
    ints = [str(int(i)) for i in rng.integers(-10**12, 10**12, 500)] + ["99999999999999999999"]
    for batch in (texts, ints):       # mixed text, and a column pd.to_numeric reads as integers
        col = pd.Series(batch, dtype=dtype)
        assert V._arrow_numbers(col) is not None          # the Arrow path is the one under test
        v, bad = parse_numbers(col)
        ov, obad = _old(monkeypatch, parse_numbers, col)
        np.testing.assert_array_equal(_bits(v), _bits(ov))
        np.testing.assert_array_equal(bad, obad)
        assert not bad.any()
        # outside reference: CPython's correctly rounded float()
        np.testing.assert_array_equal(_bits(v), _bits([float(t.strip()) for t in batch]))


@pytest.mark.parametrize("odd", ["", "   ", None, "nan", "NaN", "-nan", "inf", "-Infinity",
                                 "1e400", "-2e308", "abc", "1,5", "0x10", "1_0", "-0", "-0.0",
                                 "1e", "--1"])
def test_one_odd_field_same_values_and_rejects(monkeypatch, odd):
    rng = np.random.default_rng(15)
    n = 300
    price = [f"%.{d}g" % x for d, x in zip(rng.integers(1, 18, n), rng.uniform(0.5, 20, n))]
    qty = [str(int(q)) for q in rng.integers(1, 50, n)]
    j = int(rng.integers(0, n))
    for field in ("price", "quantity"):
        p, q = list(price), list(qty)
        (p if field == "price" else q)[j] = odd
        frame = pd.DataFrame({
            "series": pd.Series([f"s{i % 7}" for i in range(n)], dtype="string[pyarrow]"),
            "ts": pd.Series([f"2025-01-01T{(i // 7) % 24:02d}:{i // 168:02d}:00Z" for i in range(n)],
                            dtype="string[pyarrow]"),
            "price": pd.Series(p, dtype="string[pyarrow]"),
            "quantity": pd.Series(q, dtype="string[pyarrow]")})
        v, bad = parse_numbers(frame[field])
        ov, obad = _old(monkeypatch, parse_numbers, frame[field])
        np.testing.assert_array_equal(_bits(v), _bits(ov))
        np.testing.assert_array_equal(bad, obad)
        new = validate_frame(frame)
        old = _old(monkeypatch, validate_frame, frame)
        pd.testing.assert_frame_equal(new.good, old.good)
        pd.testing.assert_frame_equal(new.rejects, old.rejects)
        if odd not in ("-0", "-0.0"):           # zero price / zero quantity are rejected too
            assert j + 1 in new.rejects["row"].tolist()
            r = new.rejects.set_index("row").loc[j + 1]
            assert r["field"] == field
            assert r["value"] == ("" if odd is None else odd)


def test_leading_plus_takes_the_general_path(monkeypatch):
    # pd.to_numeric reads '+1.052e+119' one unit in the last place off the nearest float64
    # (Python's float() and the Arrow cast round correctly); the general path keeps its values
    texts = _texts(np.random.default_rng(7), 2000, plus=True)
    col = pd.Series(texts, dtype="string[pyarrow]")
    assert V._arrow_numbers(col) is None
    v, bad = parse_numbers(col)
    ov, obad = _old(monkeypatch, parse_numbers, col)
    np.testing.assert_array_equal(_bits(v), _bits(ov))
    np.testing.assert_array_equal(bad, obad)
    plain = [t.strip() for t in texts]
    unsigned = [i for i, t in enumerate(plain) if not t.startswith("+")]
    np.testing.assert_array_equal(_bits(v[unsigned]), _bits([float(plain[i]) for i in unsigned]))


def test_minus_zero_and_blank_take_the_general_path():
    # pd.to_numeric reads an all-integer column as integers: "-0" becomes +0.0 there
    assert V._arrow_numbers(pd.Series(["-0", "1"], dtype="string[pyarrow]")) is None
    v, _ = parse_numbers(pd.Series(["-0", "1"], dtype="string[pyarrow]"))
    assert not np.signbit(v[0])
    assert V._arrow_numbers(pd.Series(["1", None], dtype="string[pyarrow]")) is None
    assert V._arrow_numbers(pd.Series(["1", "nan"], dtype="string[pyarrow]")) is None
    assert V._arrow_numbers(pd.Series(["1", "2"], dtype=object)) is None     # not Arrow text


def _ts_texts(rng, n: int) -> list:
    """ISO times (with and without offsets, fractions, out-of-range fields and years), epoch
    seconds as text (integers, fractions, exponents, signs, out of range), words, junk, blanks."""
    pool = ["2025-01-31T10:00:00Z", "2025-01-31 10:00:00+02:00", "2025-01-31", "2024-02-30",
            "2025-01-01T25:00:00Z", "9999-01-01T00:00:00Z", "+12025-01-01", "-0500-01-01",
            "1677-01-01T00:00:00Z", "2025-1-2T3:4:5.123456789Z", "2025-01-31T10:00:00.5-0330",
            "1700000000", "1700000000.25", "1.7e9", "+1.7e9", "-1.7e9", "-0", "0", " 1700000000 ",
            "1e300", "inf", "-Infinity", "nan", "now", "Today", "abc", "17000-00000", "", "  ",
            None, "31/01/2025", "1_700_000_000", "0x10", "2025-01-31T10:00:00Z junk", "-5-3"]
    out = [pool[i] for i in rng.integers(0, len(pool), n)]
    out += [f"2025-{m:02d}-{d:02d}T{h:02d}:00:00Z" for m, d, h in
            zip(rng.integers(1, 13, 50), rng.integers(1, 29, 50), rng.integers(0, 24, 50))]
    out += [f"%.{d}g" % x for d, x in zip(rng.integers(1, 18, 50), rng.uniform(-1e10, 1e10, 50))]
    return out


@pytest.mark.parametrize("dtype", ["string[pyarrow]", "str", object])
def test_timestamps_skip_number_parse_on_dates_same_results(monkeypatch, dtype):
    rng = np.random.default_rng(2026)
    col = pd.Series(_ts_texts(rng, 600), dtype=dtype)
    maybe = V._number_like(col.astype("string").str.strip())
    assert maybe is not None and not maybe.all() and maybe.any()     # the skip is exercised
    ns, why = V.read_timestamps(col)
    with monkeypatch.context() as m:
        m.setattr(V, "_number_like", lambda s: None)                  # every field tries numbers
        ons, owhy = V.read_timestamps(col)
    np.testing.assert_array_equal(ns, ons)
    assert why.tolist() == owhy.tolist()
    frame = pd.DataFrame({"series": pd.Series(["a"] * len(col), dtype="string[pyarrow]"),
                          "ts": col,
                          "price": pd.Series(["2"] * len(col), dtype="string[pyarrow]"),
                          "quantity": pd.Series(["3"] * len(col), dtype="string[pyarrow]")})
    new = validate_frame(frame)
    with monkeypatch.context() as m:
        m.setattr(V, "_number_like", lambda s: None)
        old = validate_frame(frame)
    pd.testing.assert_frame_equal(new.good, old.good)
    pd.testing.assert_frame_equal(new.rejects, old.rejects)
    assert len(new.good) > 0 and len(new.rejects) > 0
