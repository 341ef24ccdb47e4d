"""``python -m benchmarks.run``: every figure group, one markdown table, benchmarks/RESULTS.md.

Usage::

    python -m benchmarks.run                 # everything (what ``make bench`` runs)
    python -m benchmarks.run --quick         # small sizes, for trying the harness
    python -m benchmarks.run --only estimator,ingest --out /tmp/r.md
    python -m benchmarks.run --only startup --update   # replace these groups' section in RESULTS.md

A group that fails leaves a row saying so (with the error) and the run goes on; the exit code
is then 1. Missed targets do not change the exit code: the table says so.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import tempfile
import time
import traceback
from pathlib import Path

from benchmarks.common import Context, Row, machine, machine_text, table

#: replay and tuning run last: they take as many runs (up to --runs) as the time budget leaves
GROUPS = ("startup", "estimator", "estimator_call", "detection", "ingest", "live", "memory",
          "restart", "dashboard", "iv", "experiments", "replay_output", "replay", "tuning")
#: seconds a group needs at least (one run of each figure, loaded machine), reserved for it
#: while the groups before it decide how many runs they can afford
MIN_S = {"tuning": 120.0}
RESULTS = Path(__file__).resolve().parent / "RESULTS.md"

INTRO = """\
# elmon benchmark results

Written by `make bench` (`python -m benchmarks.run`); do not edit by hand. Each figure is the
median over the runs shown; each reference (rows marked ↳) ran in the same process, in the same
run, on the same rows (a stated prefix of them where the reference is too slow for the whole), so
the ratios hold even though the machine is shared and the absolute numbers are noisy. Targets are
those of issue 8 for this 2-core class of machine; **NO** in the *met?* column is a missed target.
"""


def _notes(rows: list[Row]) -> str:
    from benchmarks import notes

    return notes.text(rows)


def _marks(group: str) -> tuple[str, str]:
    return f"<!-- partial run: {group} -->", f"<!-- end of partial run: {group} -->"


def partial_section(group: str, rows: list[Row], info: dict, elapsed: float,
                    sections: list[str] = ()) -> str:
    """A group's figures from a ``--only ... --update`` run, with the machine and load, and the
    whole tables the group added (``ctx.sections``: the detection grid's)."""
    from benchmarks import notes

    start, end = _marks(group)
    missed = notes.missed_lines(rows)
    why = ["", "Missed targets of this group:", "", *missed] if missed else []
    extra = [x for sec in sections for x in ("", sec)]
    return "\n".join([start, f"## Figures of group `{group}` (partial run: `python -m "
                      f"benchmarks.run --only {group} --update`)", "",
                      machine_text(info, elapsed), "", table(rows), *why, *extra, "", end])


def update_section(text: str, group: str, section: str) -> str:
    """``text`` with ``group``'s partial section replaced by ``section`` (appended if absent)."""
    start, end = _marks(group)
    i, j = text.find(start), text.find(end)
    if i >= 0 and j > i:
        return text[:i] + section + text[j + len(end):]
    return text.rstrip("\n") + "\n\n" + section + "\n"


#: the line under a full run's "## Figures" naming the groups re-measured in partial runs
SUPERSEDED = "Re-measured since in partial runs (their sections below; rows removed here): "


def drop_superseded(text: str, group: str, rows: list[Row], sections: list[str] = ()) -> str:
    """``text`` with ``rows``' lines (table rows, missed-target and ratio lines) and the whole
    tables the group added (``sections``: the full run's "## " section of the same title, up
    to the next "## " heading) taken out of the full run's part (before the first partial
    section), and ``group`` named under its "## Figures": a partial run replaces a group's
    figures, so the full run's older ones must not stand beside them."""
    cut = text.find("<!-- partial run:")
    head, tail = (text, "") if cut < 0 else (text[:cut], text[cut:])
    names = {r.figure for r in rows}
    names |= {n.replace("|", "\\|") for n in names}       # as the tables escape a bar
    starts = tuple(p for n in names for p in (f"| **{n}** |", f"| &nbsp;&nbsp;↳ {n} |",
                                               f"- **{n}**:", f"- {n}:"))
    titles = {sec.lstrip().split("\n", 1)[0].strip() for sec in sections}
    titles = {t for t in titles if t.startswith("## ")}
    lines, skip = [], False
    for ln in head.split("\n"):
        if ln.startswith("## "):
            skip = ln.strip() in titles
        if not skip and not ln.startswith(starts):
            lines.append(ln)
    if "## Figures" in lines:
        i = lines.index("## Figures")
        if i + 2 < len(lines) and lines[i + 2].startswith(SUPERSEDED):
            done = lines[i + 2][len(SUPERSEDED):].rstrip(".").split(", ")
            lines[i + 2] = SUPERSEDED + ", ".join(sorted(set(done) | {f"`{group}`"})) + "."
        else:
            lines[i + 1:i + 1] = ["", SUPERSEDED + f"`{group}`."]
    return "\n".join(lines) + tail


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m benchmarks.run", description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="small sizes (minutes, not a result)")
    ap.add_argument("--only", default="", help=f"comma-separated groups of {', '.join(GROUPS)}")
    ap.add_argument("--runs", type=int, default=3, help="repetitions per figure (median; default 3)")
    ap.add_argument("--budget-min", type=float, default=14.0,
                    help="time budget of the whole run in minutes (default 14); the replay "
                         "figure takes fewer runs rather than exceed it")
    ap.add_argument("--out", default=None, help=f"results file (default {RESULTS}; "
                                                "--quick and --only default to no file)")
    ap.add_argument("--update", action="store_true",
                    help="with --only: write these groups' figures into RESULTS.md as one "
                         "section per group (replacing that group's previous partial section), "
                         "keeping the rest of the file; the next full run rewrites it all")
    args = ap.parse_args(argv)
    groups = [g.strip() for g in args.only.split(",") if g.strip()] or list(GROUPS)
    unknown = [g for g in groups if g not in GROUPS]
    if unknown:
        ap.error(f"unknown group(s) {unknown}; choose from {', '.join(GROUPS)}")
    if args.update and (not args.only or args.quick):
        ap.error("--update needs --only (and not --quick)")
    out = Path(args.out) if args.out else (None if (args.quick or args.only) else RESULTS)

    info = machine()
    t_all = time.perf_counter()
    rows: list[Row] = []
    group_sections: dict[str, list[str]] = {}
    failed = False
    with tempfile.TemporaryDirectory(prefix="elmon-bench-") as tmp:
        ctx = Context(quick=args.quick, runs=args.runs, tmp=Path(tmp),
                      budget_s=args.budget_min * 60)
        for i, g in enumerate(groups):
            ctx.reserve_s = sum(MIN_S.get(h, 0.0) for h in groups[i + 1:])
            t0 = time.perf_counter()
            print(f"==> {g}", flush=True)
            n_sections = len(getattr(ctx, "sections", []))
            try:
                mod = importlib.import_module(f"benchmarks.{g}")
                got = mod.run(ctx)
            except Exception as exc:   # a broken group must not hide the others' figures
                traceback.print_exc()
                got = [Row(f"{g}: benchmark failed", None, group=g,
                           check=f"error: {type(exc).__name__}: {exc}")]
                failed = True
            for r in got:
                r.group = r.group or g
            group_sections[g] = list(getattr(ctx, "sections", []))[n_sections:]
            rows += got
            print(table(got), flush=True)
            print(f"    ({g}: {time.perf_counter() - t0:.0f} s)", flush=True)
    elapsed = time.perf_counter() - t_all
    info["load_end"] = os.getloadavg() if hasattr(os, "getloadavg") else None
    body = table(rows)
    sections = getattr(ctx, "sections", [])     # whole tables a group adds (detection)
    doc = "\n".join([INTRO, "## Machine", "", machine_text(info, elapsed), "", "## Figures", "",
                     body, "", *sections, _notes(rows), ""])
    print()
    print(body)
    for sec in sections:
        print("\n" + sec)
    if args.update:
        target = out or RESULTS
        text = target.read_text() if target.exists() else INTRO
        for g in groups:
            got = [r for r in rows if r.group == g]
            text = update_section(text, g, partial_section(g, got, info, elapsed,
                                                           group_sections.get(g, [])))
            text = drop_superseded(text, g, got, group_sections.get(g, []))
        target.write_text(text)
        print(f"\nupdated {target} (groups {', '.join(groups)})")
    elif out is not None:
        out.write_text(doc)
        print(f"\nwrote {out}")
    print(f"total {elapsed / 60:.1f} min")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
