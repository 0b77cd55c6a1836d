"""The pytest plugin: a folder of regression cases (``*.case.toml``) is a test suite.

Installed with the package (the ``pytest11`` entry point ``streamcond``), so ``pytest DIR``
collects every case file under DIR: one test per case, which replays the recording with the
config and compares the edges with the golden file, exactly as ``streamcond replay --expect``
does, and checks any summary figures the case pins. A failing case shows the same readable
difference lines as ``--expect`` (moved, missing and unexpected edges with their times), not a
Python assertion. It runs under pytest-xdist (``-n auto``) and reports through ``--junitxml``
like any other test. Disable it with ``-p no:streamcond``.

After a reviewed change, ``--streamcond-update-golden`` rewrites the golden file of every
case whose edges differ (never by default); the run lists the files it rewrote.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import pytest

from .casefile import CASE_SUFFIX

UPDATE_OPTION = "--streamcond-update-golden"
_REWRITTEN = "streamcond_golden_rewritten"


def pytest_addoption(parser: pytest.Parser) -> None:
    group = parser.getgroup("streamcond", "streamcond regression cases (*.case.toml)")
    group.addoption(
        UPDATE_OPTION,
        action="store_true",
        default=False,
        dest="streamcond_update_golden",
        help="rewrite the golden events file of every case whose edges differ (after you have "
        "reviewed the change; never done by default)",
    )


def pytest_collect_file(file_path: Path, parent: pytest.Collector) -> pytest.Collector | None:
    if file_path.name.endswith(CASE_SUFFIX):
        return CaseFile.from_parent(parent, path=file_path)
    return None


class CaseFile(pytest.File):
    """A ``*.case.toml`` file; read when its test runs, so a broken case is a failed test
    with a plain sentence (and shows in the JUnit report), not a collection error."""

    def collect(self):
        yield CaseItem.from_parent(self, name=self.path.name.removesuffix(CASE_SUFFIX))


class CaseDiffers(Exception):
    """A case's replay disagrees with its golden file or pinned figures."""

    def __init__(self, header: str, lines: list[str]) -> None:
        self.header = header
        self.lines = lines
        super().__init__("\n".join([header, *lines]))


class CaseItem(pytest.Item):
    def runtest(self) -> None:
        from .batch import Tally
        from .casefile import check_summary, load_case
        from .config import load_config
        from .errors import InputError
        from .golden import compare, load_edges
        from .io.eventlog import EventLog
        from .replay import run_replay

        case = load_case(self.path)
        cfg = load_config(case.config)
        update = self.config.getoption("streamcond_update_golden")
        tally = Tally()  # the edges only: memory does not grow with the recording
        if not update and not case.golden.exists():
            raise InputError(f"The golden file {_show(case.golden)!r} does not exist; "
                             f"`pytest {UPDATE_OPTION}` writes it from the replay (review it)")
        try:
            expected = load_edges(case.golden) if case.golden.exists() else []
        except InputError:
            if not update:
                raise
            expected = []  # an empty or broken golden file: the update replaces it
        if update:
            tmp = case.golden.with_name(case.golden.name + f".{os.getpid()}.tmp")
            writer = EventLog(str(tmp), mode="replace",
                              inputs=[("recording", case.recording), ("config", case.config)])

            def sink(rec: dict[str, Any]) -> None:
                tally(rec)
                writer(rec)

            try:
                res = run_replay(cfg, case.recording, sink)
            finally:
                writer.close()
            diff = compare(expected, tally.edges, case.tolerance)
            if diff or not case.golden.exists():
                os.replace(tmp, case.golden)  # atomic: a reader sees the old or the new file
                self.user_properties.append((_REWRITTEN, f"{case.golden} ({len(tally.edges)} edges)"))
            else:
                tmp.unlink()
            diff = []
        else:
            res = run_replay(cfg, case.recording, tally)
            diff = compare(expected, tally.edges, case.tolerance)
        lines = diff + check_summary(case, res.summary)
        if lines:
            hint = (
                "(after reviewing the change, `pytest --streamcond-update-golden` rewrites the "
                "golden file; pinned [summary] figures are edited in the case file)"
            )
            raise CaseDiffers(
                f"replay of {_show(case.recording)} with {_show(case.config)} differs from "
                f"{_show(case.golden)}:",
                lines + [hint],
            )

    def repr_failure(self, excinfo: pytest.ExceptionInfo[BaseException], style: Any = None) -> str:
        from .errors import StreamcondError

        if isinstance(excinfo.value, CaseDiffers):
            return str(excinfo.value)
        if isinstance(excinfo.value, StreamcondError):
            return "\n".join(excinfo.value.messages)
        return super().repr_failure(excinfo, style=style)

    def reportinfo(self) -> tuple[Path, int | None, str]:
        return self.path, None, f"streamcond case {self.name}"


def _show(path: Path) -> str:
    """A path as short as it reads well: relative to the current folder when below it."""
    rel = os.path.relpath(path)
    return str(path) if rel.startswith("..") else rel


def pytest_configure(config: pytest.Config) -> None:
    config.pluginmanager.register(_RewrittenReport(), "streamcond-rewritten-goldens")


class _RewrittenReport:
    """Lists the golden files an update run rewrote, at the end of the run (under xdist the
    controller receives the workers' reports, with their user properties)."""

    def __init__(self) -> None:
        self.rewritten: list[str] = []

    def pytest_runtest_logreport(self, report: pytest.TestReport) -> None:
        if report.when == "call":
            self.rewritten += [str(v) for k, v in report.user_properties if k == _REWRITTEN]

    def pytest_terminal_summary(self, terminalreporter: Any) -> None:
        if self.rewritten:
            terminalreporter.section("streamcond: golden files rewritten")
            for line in self.rewritten:
                terminalreporter.write_line(line)
