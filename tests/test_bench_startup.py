"""Start-up of the command line and the benchmark runner's partial update (issue 15).

Not a speed test: it checks *which* modules are loaded. Building ``elmon``'s parser (what
``elmon --help`` and every command do first) must not import the heavy packages; each
command imports them when it runs. The start time itself is measured in benchmarks/startup.py.
"""

from __future__ import annotations

import subprocess
import sys

import pytest

from benchmarks.startup import HEAVY

from monitor.cli import COMMAND_MODULES


def _loaded_after(code: str) -> list[str]:
    probe = (code + "\nimport sys\nprint(' '.join(sorted({m.split('.')[0] for m in sys.modules} & "
             + repr(set(HEAVY)) + ")))")
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,
                         timeout=300, check=True)          # hang guard only
    return out.stdout.split()


@pytest.mark.parametrize("module", COMMAND_MODULES)
def test_registering_a_command_imports_no_heavy_package(module):
    code = ("import argparse, importlib\n"
            "sub = argparse.ArgumentParser().add_subparsers()\n"
            f"importlib.import_module({module!r}).register(sub)")
    assert _loaded_after(code) == [], f"{module} imports these while the parser is built"


def test_elmon_help_lists_the_commands_without_heavy_imports():
    code = ("import contextlib, io\n"
            "from monitor.cli import main\n"
            "buf = io.StringIO()\n"
            "with contextlib.redirect_stdout(buf), contextlib.suppress(SystemExit):\n"
            "    main(['--help'])\n"
            "assert 'replay' in buf.getvalue() and 'COMMAND' in buf.getvalue()")
    assert _loaded_after(code) == []


def test_monitor_package_still_gives_the_estimator():
    import monitor

    est = monitor.ElasticityRLS(forgetting=0.99)
    assert est.status == "warming_up"
    with pytest.raises(AttributeError, match="no attribute 'Nothing'"):
        monitor.Nothing   # noqa: B018


def test_replay_chart_choices_are_checked_and_shown(capsys):
    """The chart options' choices are looked up lazily, but still refused and listed."""
    from monitor.cli import build_parser
    from monitor.detectors.spec import CHART_CHOICES

    parser = build_parser()
    with pytest.raises(SystemExit):
        parser.parse_args(["replay", "log.csv", "--out", "o", "--level-chart", "wobble"])
    err = capsys.readouterr().err
    assert "invalid choice: 'wobble'" in err and all(repr(c) in err for c in CHART_CHOICES)
    args = parser.parse_args(["replay", "log.csv", "--out", "o", "--slope-chart", "none"])
    assert args.slope_chart == "none"
    with pytest.raises(SystemExit):
        parser.parse_args(["replay", "--help"])
    out = capsys.readouterr().out
    assert ", ".join(CHART_CHOICES) in " ".join(out.split())    # help text lists them


def test_partial_update_replaces_only_its_group_section():
    from benchmarks.run import update_section

    text = "# results\n\nbody\n"
    a1 = update_section(text, "startup", "<!-- partial run: startup -->\nA1\n"
                                         "<!-- end of partial run: startup -->")
    b = update_section(a1, "replay_output", "<!-- partial run: replay_output -->\nB\n"
                                            "<!-- end of partial run: replay_output -->")
    a2 = update_section(b, "startup", "<!-- partial run: startup -->\nA2\n"
                                      "<!-- end of partial run: startup -->")
    assert a2.startswith(text.rstrip("\n")) and "A1" not in a2 and "A2" in a2 and "\nB\n" in a2
    assert a2.count("<!-- partial run: startup -->") == 1


def test_partial_update_takes_its_rows_out_of_the_full_run():
    """A partial run's figures replace the full run's: their table rows, missed-target and ratio
    lines leave the full run's part (not the partial sections), and the group is named there."""
    from benchmarks.common import Row
    from benchmarks.run import SUPERSEDED, drop_superseded

    full = ("# results\n\n## Figures\n\n| figure | v |\n|---|---|\n| **fast thing** | 1 |\n"
            "| &nbsp;&nbsp;↳ slow ref | 2 |\n| **other thing** | 3 |\n\n## Missed targets\n\n"
            "- **fast thing**: 1 against 2.\n\n## Ratios against the references\n\n"
            "- fast thing: 1; slow ref 2\n- other thing: 3\n\n"
            "<!-- partial run: g -->\n| **fast thing** | 9 |\n<!-- end of partial run: g -->\n")
    rows = [Row("fast thing", 9.0, "x", [9.0]), Row("slow ref", 2.0, "x", [2.0], reference=True)]
    out = drop_superseded(full, "g", rows)
    head, tail = out.split("<!-- partial run: g -->")
    assert "fast thing" not in head and "slow ref" not in head
    assert "| **other thing** | 3 |" in head and "- other thing: 3" in head
    assert "| **fast thing** | 9 |" in tail
    assert f"{SUPERSEDED}`g`." in head
    again = drop_superseded(out, "h", [])
    assert f"{SUPERSEDED}`g`, `h`." in again and again.count(SUPERSEDED) == 1
    # the whole tables a group added (the detection grid's section) leave the full run's part
    # too, up to the next section; the partial part keeps its copy
    full = ("# results\n\n## Figures\n\n| **x** | 1 |\n\n## Grid of g\n\nold cells\n\n"
            "### sub\n\nold sub\n\n## Missed targets\n\n- **x**: 1\n\n"
            "<!-- partial run: g -->\n## Grid of g\n\nnew cells\n<!-- end of partial run: g -->\n")
    out = drop_superseded(full, "g", [Row("x", 2.0, "x", [2.0])], ["## Grid of g\n\nnew cells"])
    head, tail = out.split("<!-- partial run: g -->")
    assert "old cells" not in head and "old sub" not in head and "## Grid of g" not in head
    assert "## Missed targets" in head and "new cells" in tail
    # a figure whose name holds a bar is escaped in the table (the change-time row was left)
    full = "## Figures\n\n| **err \\|a\\| / b** | 1 |\n| **other** | 2 |\n"
    out = drop_superseded(full, "g", [Row("err |a| / b", 1.0, "x", [1.0])])
    assert "err" not in out and "| **other** | 2 |" in out


def test_partial_section_keeps_the_whole_tables_its_group_added():
    """A partial run of the detection group writes its grid tables (ctx.sections) into its
    section of RESULTS.md, not only the summary rows (they were dropped before)."""
    from benchmarks.common import Row, machine
    from benchmarks.run import partial_section

    grid = "### Detection against the information bound (issue 12)\n\n| a | b |\n|---|---|"
    rows = [Row("detection: x", 1.0, "x", [1.0], target="report", group="detection")]
    info = machine()
    info["load_end"] = info.get("load_start")
    sec = partial_section("detection", rows, info, 60.0, [grid])
    assert grid in sec and sec.index("detection: x") < sec.index(grid)
    assert sec.rstrip().endswith("<!-- end of partial run: detection -->")
