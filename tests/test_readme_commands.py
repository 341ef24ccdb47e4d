"""Every shell command in README.md's code blocks runs as written, or is listed here as not
runnable in a test with the reason (issue 16: "every README command runs as written").

The README's commands are indented code blocks (four spaces). A block line that starts with
``elmon``, ``make`` or ``cat`` is a command; ``\\`` continues it on the next line, ``<<'EOF'``
takes the following lines up to ``EOF`` as its input, and ``# ...`` is a comment.

- :func:`test_every_readme_command_is_classified_and_parses` (fast): each command is either
  runnable or matched by :data:`NOT_RUNNABLE` (with its reason), and every ``elmon`` command,
  runnable or not, is accepted by elmon's own argument parser as written (a missing required
  option or a misspelt one fails here).
- :func:`test_readme_commands_run_as_written` (slow: it replays, tunes and solves ARLs, about
  a minute of wall time on a loaded 2-core machine): the runnable commands run in order in one
  scratch folder, ``elmon`` in-process through :func:`monitor.cli.main`, ``cat`` heredocs by
  bash, and each exits 0. Files the README assumes the reader already has (their own sales
  log, next month's log) are made first by :data:`READER_FILES` with elmon's simulator.
"""

from __future__ import annotations

import contextlib
import io
import re
import shlex
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"

#: (regex on the command, reason): commands a test cannot run as written.
NOT_RUNNABLE = [
    (r"^make test\b", "runs this whole test suite (it would run itself)"),
    (r"^make demo\b", "runs the live demo until Ctrl-C; tests/test_demo.py runs `elmon demo` "
                      "with a short --duration, and checks `make -n demo PORT=...`"),
    (r"^elmon demo\b(?!.*--duration)", "runs until Ctrl-C (feed, service and dashboard); "
                                       "tests/test_demo.py runs the demo with --duration"),
    (r"^elmon demo\b.*--duration\s+([6-9]\d|\d{3,})", "runs for a minute or more by design; "
                                                      "tests/test_demo.py runs it for seconds"),
    (r"^elmon dashboard\b", "serves until Ctrl-C; tests/test_dashboard_security.py starts it "
                            "on a free port and tests/test_dashboard_browser.py drives it"),
    (r"^elmon simulate\b.*--live\b", "appends rows in real time until stopped"),
    (r"^elmon run\b(?!.*--once)", "the service follows its sources until stopped; "
                                  "`elmon run --once` is run by tests/test_service.py"),
    (r"--scheduler\s+tcp://", "needs a running Dask cluster at that address"),
    (r"\bbig\.parquet\b", "big.parquet stands for the reader's own large log; chunked and "
                          "Dask replays are tested in tests/test_replay_scale.py and "
                          "tests/test_dask_engine.py"),
    (r"^elmon tune\b(?!.*--truth)", "designs and checks thresholds for the ARL0 on simulated "
                                    "in-control paths long enough for it: minutes on a "
                                    "year's log; tests/test_tuning.py::test_cli_tune_both_modes "
                                    "runs the same command on a small log"),
    (r"^elmon series\b", "acts on a live store holding the reader's series (the README's "
                          "elmon.sqlite of `elmon run`); tests/test_series_reset.py runs the "
                          "same commands on a store the service made"),
    (r"^elmon bounds\b", "acts on a live store holding the reader's series (the README's "
                         "elmon.sqlite of `elmon run`); tests/test_bounds_cmd.py runs the same "
                         "commands on a store, one of them while a Monitor holds it"),
    (r"^elmon\b.*(?<![\w./-])[A-Z][A-Z_]{2,}(?![\w.-])", "names a placeholder in capitals "
                                                        "(STORE, LOG, DIR) the reader fills in"),
]

#: Files the README takes as the reader's own, made with elmon's simulator before the run
#: (argv of ``elmon``, run in the scratch folder).
READER_FILES = {
    "sales.csv": ["simulate", "retail", "--seed", "5", "--out", "sales.csv"],
    "next.csv": ["simulate", "retail", "--seed", "12", "--out", "next.csv",
                 "--truth", "next_truth.csv"],
}


def _day_first_semicolon(folder: Path) -> None:
    """``sales_dmy.csv``: the README's reader with day-first dates and ';' between fields
    (sales.csv rewritten: 2024-01-31T00:00:00Z becomes 31/01/2024)."""
    import pandas as pd

    log = pd.read_csv(folder / "sales.csv", dtype=str)
    log["ts"] = pd.to_datetime(log["ts"], utc=True).dt.strftime("%d/%m/%Y")
    log.to_csv(folder / "sales_dmy.csv", sep=";", index=False)


#: Files made from the ones above in Python (name -> function of the scratch folder).
DERIVED_READER_FILES = {"sales_dmy.csv": _day_first_semicolon}


def readme_commands(text: str) -> list[dict]:
    """The commands of the README's indented code blocks, in order: ``{'line', 'cmd',
    'stdin'}`` (``stdin`` is the heredoc body or ``None``)."""
    lines = text.splitlines()
    out, i, fenced = [], 0, False
    while i < len(lines):
        raw = lines[i]
        if raw.lstrip().startswith("```"):
            fenced = not fenced
            i += 1
            continue
        if fenced or not raw.startswith("    ") or raw.startswith("     "):
            i += 1
            continue
        body = raw[4:]
        if not re.match(r"(elmon|make|cat)\b", body):
            i += 1
            continue
        start = i + 1
        cmd = body
        while cmd.rstrip().endswith("\\") and i + 1 < len(lines):
            i += 1
            cmd = cmd.rstrip()[:-1].rstrip() + " " + lines[i].strip()
        stdin = None
        m = re.search(r"<<\s*'?(\w+)'?", cmd)
        if m:
            end_word, body_lines = m.group(1), []
            i += 1
            while i < len(lines) and lines[i].strip() != end_word:
                body_lines.append(lines[i][4:] if lines[i].startswith("    ") else lines[i])
                i += 1
            stdin = "\n".join(body_lines) + "\n"
        cmd = re.sub(r"\s+#.*$", "", cmd).strip() if m is None else cmd.strip()
        out.append({"line": start, "cmd": cmd, "stdin": stdin})
        i += 1
    return out


def not_runnable_reason(cmd: str) -> str | None:
    for pattern, reason in NOT_RUNNABLE:
        if re.search(pattern, cmd):
            return reason
    return None


def _argv(cmd: str) -> list[str]:
    # a usage line may show optional parts in brackets: drop them for the parse check
    return shlex.split(re.sub(r"\[[^\]]*\]", "", cmd))[1:]


def _parse_error(argv: list[str]) -> str | None:
    from monitor.cli import build_parser

    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        try:
            parser = build_parser()
            _, extra = parser.parse_known_args(argv)
            if extra:
                return f"unrecognized arguments: {extra}"
        except SystemExit as exc:
            return err.getvalue().strip() or f"exit {exc.code}"
    return None


def test_readme_parser_reads_blocks_continuations_and_heredocs():
    text = ("Intro\n\n    elmon arl cusum --k 0.5   # a comment\n    make test\n\n"
            "    cat > s.toml <<'EOF'\n    [a]\n    b = 1\n    EOF\n"
            "    elmon tune x.csv \\\n        --out t/\n\n```\n    elmon not-this\n```\n"
            "  - a list item\n      elmon nor-this-one\n")
    cmds = readme_commands(text)
    assert [c["cmd"] for c in cmds] == ["elmon arl cusum --k 0.5", "make test",
                                       "cat > s.toml <<'EOF'", "elmon tune x.csv --out t/"]
    assert cmds[2]["stdin"] == "[a]\nb = 1\n" and cmds[0]["stdin"] is None
    assert not_runnable_reason("elmon run --config x.toml")
    assert not_runnable_reason("elmon run --config x.toml --once") is None
    assert not_runnable_reason("elmon alerts truth --db STORE --out truth.csv")
    assert not_runnable_reason("elmon replay retail.csv --out replay-out/") is None
    assert not_runnable_reason("cat > space.toml <<'EOF'") is None
    assert _parse_error(["replay", "next.csv", "--config", "c.toml"])   # --out is required
    assert _parse_error(["replay", "a.csv", "--out", "o/", "--no-such-option"])


def test_every_readme_command_is_classified_and_parses():
    cmds = readme_commands(README.read_text(encoding="utf-8"))
    assert len(cmds) >= 10, "the README's command blocks were not found"
    runnable = [c for c in cmds if not_runnable_reason(c["cmd"]) is None]
    assert any(c["cmd"].startswith("elmon replay") for c in runnable)
    problems = []
    for c in cmds:
        if c["cmd"].startswith("elmon "):
            err = _parse_error(_argv(c["cmd"]))
            if err:
                problems.append(f"README line {c['line']}: {c['cmd']!r}: {err}")
        elif c["cmd"].startswith("make ") and not_runnable_reason(c["cmd"]) is None:
            problems.append(f"README line {c['line']}: {c['cmd']!r}: a make target this test "
                            "does not know; run it here or list it in NOT_RUNNABLE")
    assert not problems, "\n".join(problems)


@pytest.mark.slow
def test_readme_commands_run_as_written(tmp_path, monkeypatch):
    from monitor.cli import main

    monkeypatch.chdir(tmp_path)
    for name, argv in READER_FILES.items():
        assert main(argv) == 0, f"making the reader's file {name}"
    for name, make in DERIVED_READER_FILES.items():
        make(Path.cwd())
    ran = []
    for c in readme_commands(README.read_text(encoding="utf-8")):
        if not_runnable_reason(c["cmd"]) is not None:
            continue
        if c["cmd"].startswith("elmon "):
            with contextlib.redirect_stdout(io.StringIO()) as out:
                rc = main(shlex.split(c["cmd"])[1:])
            assert rc == 0, f"README line {c['line']}: {c['cmd']!r} exited {rc}\n" \
                            f"{out.getvalue()[-2000:]}"
        else:
            script = c["cmd"]
            if c["stdin"] is not None:     # a heredoc is part of the script bash reads
                end = re.search(r"<<\s*'?(\w+)'?", script).group(1)
                script = f"{script}\n{c['stdin']}{end}\n"
            done = subprocess.run(["bash", "-c", script], text=True, capture_output=True,
                                  cwd=tmp_path, timeout=600)        # hang guard
            assert done.returncode == 0, f"README line {c['line']}: {c['cmd']!r}: " \
                                         f"{done.stderr}"
            target = re.match(r"cat\s*>\s*(\S+)", script)
            if target and c["stdin"].strip():   # the file holds what the README shows
                assert (tmp_path / target.group(1)).read_text() == c["stdin"], c["cmd"]
        ran.append(c["cmd"])
    assert any(r.startswith("elmon tune") for r in ran) and \
        any(r.startswith("elmon replay") for r in ran)
