"""Shared pieces of the benchmarks: result rows, timing, the machine description, the table.

A figure is a :class:`Row`; its ``runs`` hold one value per repetition and ``value`` is their
median. A reference measured beside it is another row with ``reference=True`` whose ``ratio``
says how elmon compares (``elmon 120x faster``). Throughputs are higher-is-better, times are
lower-is-better (``better="higher"`` / ``"lower"``).
"""

from __future__ import annotations

import datetime as dt
import gc
import importlib
import importlib.metadata as md
import math
import os
import platform
import statistics
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

ROOT = Path(__file__).resolve().parents[1]


@dataclass
class Row:
    """One line of the results table."""

    figure: str
    value: float | None = None          # median of runs (None: not measured)
    unit: str = ""
    runs: list[float] = field(default_factory=list)
    target: str = ""                    # e.g. ">= 30M obs/s"
    met: bool | None = None             # None: no target
    ratio: str = ""                     # reference rows: how elmon compares
    check: str = ""                     # equivalence check or note
    reference: bool = False
    better: str = "higher"
    group: str = ""
    profile: dict = field(default_factory=dict)   # share of time per part (cProfile), if taken


def profile_shares(fn: Callable[[], object], parts: dict[str, list[tuple[str, str]]]
                   ) -> dict[str, float]:
    """Run ``fn`` under cProfile; the share of its time spent in each part.

    ``parts`` maps a label to ``(file name fragment, function name)`` pairs; a part's time is
    the cumulative time of its functions (pick parts that do not nest in one another). Parts
    whose functions did not run are left out; ``other`` is the remainder.
    """
    import cProfile
    import pstats

    prof = cProfile.Profile()
    prof.enable()
    try:
        fn()
    finally:
        prof.disable()
    st = pstats.Stats(prof)
    total = max((v[3] for v in st.stats.values()), default=0.0)   # the outermost call
    if total <= 0:
        return {}
    out = {}
    for label, funcs in parts.items():
        cum = sum(v[3] for (f, _, name), v in st.stats.items()
                  if any(name == fn_ and frag in f for frag, fn_ in funcs))
        if cum > 0:
            out[label] = min(cum / total, 1.0)
    rest = 1.0 - sum(out.values())
    if rest > 0.005:
        out["other"] = rest
    return out


def shares_text(shares: dict[str, float]) -> str:
    """'writing outputs 51%, validation 18%, ...' largest first."""
    return ", ".join(f"{k} {v:.0%}" for k, v in sorted(shares.items(), key=lambda kv: -kv[1])
                     if v >= 0.005)


def median(values: list[float]) -> float:
    return float(statistics.median(values))


def timed(fn: Callable[[], object]) -> tuple[float, object]:
    """Seconds taken by ``fn()`` (garbage collector off while timing) and its result.

    ``timed.cpu_share`` is then the process CPU time over the wall time of that call: for a
    single-threaded figure, the share of one core the process actually got on the shared
    machine (1.0 = a core to itself).
    """
    gc.collect()
    was = gc.isenabled()
    gc.disable()
    try:
        c0 = time.process_time()
        t0 = time.perf_counter()
        res = fn()
        t = time.perf_counter() - t0
        timed.cpu_share = (time.process_time() - c0) / t if t > 0 else float("nan")
        return t, res
    finally:
        if was:
            gc.enable()


timed.cpu_share = float("nan")


def share_note(shares: list[float], n: int | None = None, times: list[float] | None = None,
               unit: str = "obs") -> str:
    """'got 0.62-0.97 of a core': how much CPU the timed runs received; with ``n`` and
    ``times`` also the median rate per CPU-second (what an unshared core would give, roughly)."""
    if not shares:
        return ""
    txt = f"the process got {min(shares):.2f}-{max(shares):.2f} of a core while timed"
    if n and times:
        per_cpu = median([n / (t * s) for t, s in zip(times, shares) if t * s > 0])
        txt += f" ({fmt(per_cpu, unit + '/s')} per CPU-second)"
    return txt


def repeat(fn: Callable[[], object], runs: int) -> tuple[list[float], object]:
    """Times of ``runs`` calls of ``fn`` and the last result."""
    times, res = [], None
    for _ in range(runs):
        t, res = timed(fn)
        times.append(t)
    return times, res


def rate_row(figure: str, n: int, times: list[float], unit: str = "obs/s", target: float | None = None,
             **kw) -> Row:
    """A throughput row: ``n`` items per run, median of ``n / t``."""
    rates = [n / t for t in times]
    v = median(rates)
    row = Row(figure, v, unit, rates, **kw)
    if target is not None:
        row.target = f">= {fmt(target, unit)}"
        row.met = v >= target
    return row


def speed_ratio(elmon_rate: float, ref_rate: float) -> str:
    """How many times elmon's throughput is the reference's."""
    if not (ref_rate and math.isfinite(ref_rate)):
        return ""
    r = elmon_rate / ref_rate
    return f"elmon {r:,.0f}x faster" if r >= 10 else (f"elmon {r:.1f}x faster" if r >= 1 else
                                                       f"elmon {1 / r:.1f}x slower")


def fmt(v: float | None, unit: str = "") -> str:
    """Engineering format: 31.2M obs/s, 48.9k obs/s, 0.42 ms, 1.8 s, 96 MB."""
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "n/a"
    a = abs(v)
    if unit.endswith("/s"):
        if a >= 1e6:
            s = f"{v / 1e6:.1f}M"
        elif a >= 1e3:
            s = f"{v / 1e3:.1f}k"
        else:
            s = f"{v:.0f}"
        return f"{s} {unit}"
    if unit in ("s", "ms", "us", "x"):
        s = f"{v:.3g}" if a < 100 else f"{v:,.0f}"
        return f"{s}{unit}" if unit == "x" else f"{s} {unit}"
    if unit in ("MB", "bytes", "updates", "rows"):
        return f"{v:,.0f} {unit}" if a >= 100 else f"{v:.3g} {unit}"
    return f"{v:.4g} {unit}".strip()


def not_measured(figure: str, reason: str, target: str = "", group: str = "") -> Row:
    return Row(figure, None, target=target, check=f"not measured: {reason}", group=group)


def has_module(name: str) -> bool:
    try:
        return importlib.util.find_spec(name) is not None
    except (ImportError, ValueError):
        return False


def has_attr(module: str, attr: str) -> bool:
    if not has_module(module):
        return False
    try:
        return hasattr(importlib.import_module(module), attr)
    except Exception:       # a module half-written by a colleague right now
        return False


# ---------------------------------------------------------------------------- the machine

def _cpu_model() -> str:
    """Model name, family/model numbers, cache size, and whether it is a virtual machine."""
    fields: dict[str, str] = {}
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if ":" in line:
                k, v = (x.strip() for x in line.split(":", 1))
                fields.setdefault(k, v)
    except OSError:
        return platform.processor() or "unknown"
    name = fields.get("model name", platform.processor() or "unknown")
    extra = [f"family {fields['cpu family']}, model {fields['model']}"] if "cpu family" in fields else []
    if "cache size" in fields:
        extra.append(f"cache {fields['cache size']}")
    if "hypervisor" in fields.get("flags", "").split():
        extra.append("virtual machine")
    return f"{name} ({', '.join(extra)})" if extra else name


def _mem_total_gb() -> float | None:
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal"):
                return int(line.split()[1]) / 1024 ** 2
    except OSError:
        pass
    return None


def _version(dist: str) -> str:
    try:
        return md.version(dist)
    except md.PackageNotFoundError:
        return "not installed"


def _git(*args: str) -> str:
    try:
        return subprocess.run(["git", *args], cwd=ROOT, capture_output=True, text=True,
                              timeout=10).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return ""


LIBRARIES = ("numpy", "numba", "pandas", "pyarrow", "scipy", "river", "statsmodels", "streamlit",
             "sqlite-utils", "psutil")


def machine() -> dict:
    """Cores, CPU model, memory, OS, Python and library versions, commit, load, date."""
    import sqlite3

    try:
        usable = len(os.sched_getaffinity(0))
    except AttributeError:
        usable = os.cpu_count()
    status = _git("status", "--porcelain", "--untracked-files=no")
    return {
        "date": dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        "cores": os.cpu_count(), "usable_cores": usable, "cpu": _cpu_model(),
        "memory_gb": _mem_total_gb(), "os": platform.platform(),
        "python": sys.version.split()[0], "sqlite": sqlite3.sqlite_version,
        "libraries": {name: _version(name) for name in LIBRARIES},
        "elmon": _version("elmon"), "commit": _git("rev-parse", "--short", "HEAD"),
        "dirty": bool(status),
        "openblas_coretype": os.environ.get("OPENBLAS_CORETYPE", "(not set)"),
        "load_start": os.getloadavg() if hasattr(os, "getloadavg") else None,
    }


# ---------------------------------------------------------------------------- the table

HEADER = ("figure", "measured (median)", "runs", "target", "met?", "vs elmon",
          "equivalence check / notes")


def _cell(text: str) -> str:
    return str(text).replace("|", "\\|").replace("\n", " ")


def table(rows: list[Row]) -> str:
    """The one markdown table of all figures."""
    lines = ["| " + " | ".join(HEADER) + " |", "|" + "---|" * len(HEADER)]
    for r in rows:
        name = f"&nbsp;&nbsp;↳ {r.figure}" if r.reference else f"**{r.figure}**"
        if r.value is None:
            measured = "—"
        else:
            measured = fmt(r.value, r.unit)
        runs = str(len(r.runs)) if r.runs else ""
        met = "" if r.met is None else ("yes" if r.met else "**NO**")
        lines.append("| " + " | ".join(_cell(c) for c in (name, measured, runs, r.target, met,
                                                           r.ratio, r.check)) + " |")
    return "\n".join(lines)


def machine_text(m: dict, elapsed_s: float | None = None) -> str:
    libs = ", ".join(f"{k} {v}" for k, v in m["libraries"].items())
    load = m.get("load_start")
    load_end = m.get("load_end")
    parts = [
        f"- date: {m['date']}",
        f"- machine: {m['cores']} cores ({m['usable_cores']} usable), {m['cpu']}, "
        f"{m['memory_gb']:.1f} GB RAM, {m['os']}" if m.get("memory_gb") else
        f"- machine: {m['cores']} cores, {m['cpu']}, {m['os']}",
        f"- Python {m['python']}, SQLite {m['sqlite']}; {libs}",
        f"- elmon {m['elmon']} at commit {m['commit']}{' (with uncommitted changes)' if m['dirty'] else ''}; "
        f"OPENBLAS_CORETYPE={m['openblas_coretype']} (left as found)",
    ]
    if load:
        txt = f"- load average (1/5/15 min) at start: {load[0]:.2f} / {load[1]:.2f} / {load[2]:.2f}"
        if load_end:
            txt += f"; at end: {load_end[0]:.2f} / {load_end[1]:.2f} / {load_end[2]:.2f}"
        parts.append(txt + " (the machine is shared: other work runs beside the benchmark)")
    if elapsed_s is not None:
        parts.append(f"- wall time of the whole run: {elapsed_s / 60:.1f} min")
    return "\n".join(parts)


class Context:
    """Run settings shared by the groups: sizes (``quick`` shrinks them), repetitions, scratch."""

    def __init__(self, quick: bool = False, runs: int = 3, tmp: Path | None = None,
                 budget_s: float = 14 * 60):
        self.quick = quick
        self.runs = runs
        self.tmp = tmp
        self.log = print
        self.deadline = time.monotonic() + budget_s
        self.reserve_s = 0.0     # set by the runner: time the groups still to come need

    def time_left(self) -> float:
        """Seconds left of the whole run's budget (``make bench`` must end within 15 min) after
        the time reserved for the groups that follow."""
        return self.deadline - time.monotonic() - self.reserve_s

    def size(self, full: int, quick: int) -> int:
        return quick if self.quick else full


def attempt(figure: str, fn: Callable[[], list[Row]], target: str = "") -> list[Row]:
    """``fn()``'s rows, or one row saying why the figure could not be measured (the library
    piece is missing or broken at the moment), so the other figures still come out."""
    try:
        return fn()
    except Exception as exc:    # noqa: BLE001 - reported in the table, the run goes on
        import traceback

        traceback.print_exc()
        return [not_measured(figure, f"{type(exc).__name__}: {exc}", target=target)]
