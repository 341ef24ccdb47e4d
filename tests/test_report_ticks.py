"""Issue 16: the HTML report's date ticks sit at the dates their labels name (checked on the
SVG text: each label's x equals the chart's x position of that labelled date)."""

from __future__ import annotations

import re

import pandas as pd
import pytest

from monitor.report.svg import Chart, time_ticks


def _labels(svg: str, bottom_y: float) -> list[tuple[float, str]]:
    pat = re.compile(r'<text x="([-\d.]+)" y="' + re.escape(f"{bottom_y:g}")
                     + r'" font-size="10" text-anchor="middle">([^<]+)</text>')
    return [(float(x), lab) for x, lab in pat.findall(svg)]


@pytest.mark.parametrize("start,end,fmt", [
    ("2023-01-01", "2023-12-31", "%Y-%m"),          # a year of daily data: the case
    ("2023-01-10", "2023-03-20", "%Y-%m"),
    ("2019-03-05", "2024-08-01", "%Y"),
    ("2023-05-01", "2023-05-20", "%Y-%m-%d"),
    ("2023-05-01 00:00", "2023-05-02 06:00", "%m-%d %H:%M"),
])
def test_each_tick_label_sits_at_its_date(start, end, fmt):
    lo, hi = pd.Timestamp(start, tz="UTC"), pd.Timestamp(end, tz="UTC")
    ch = Chart((lo.value, hi.value), (0.0, 1.0), x_time=True)
    svg = ch.to_svg()
    labels = _labels(svg, ch.height - ch.m[2] + 14)
    assert len(labels) >= 2
    for x, lab in labels:
        when = pd.to_datetime(lab, format=fmt, utc=True)
        if fmt == "%m-%d %H:%M":
            when = when.replace(year=lo.year)
        assert abs(float(ch.sx([when.value])[0]) - x) < 0.06, (lab, x)   # svg rounds to 0.1 px
        assert lo <= when <= hi


def test_month_ticks_start_on_the_first_of_a_month():
    lo, hi = pd.Timestamp("2023-01-01", tz="UTC"), pd.Timestamp("2023-12-31", tz="UTC")
    ticks, fmt = time_ticks(lo.value, hi.value)
    days = pd.to_datetime(pd.Series(ticks, dtype="int64"), utc=True)
    assert fmt == "%Y-%m" and (days.dt.day == 1).all() and (days.dt.hour == 0).all()
    assert days.iloc[0] == pd.Timestamp("2023-01-01", tz="UTC")
