"""The fast subset of ``make reliability``: every check at a small size, against real ``veil serve`` processes.

The full sizes (32 clients, 25 promote/rollback cycles, 60 kill -9 trials,
200 fuzzed requests per operation, 2 × 255 undrifted live checks and 100 per
planted change and series) run in ``make reliability``; the figures are in
docs/reliability.md.  At the quick size the live checks' targets are not
judged (a handful of checks says nothing about a 1% rate): every check must
be answered, and the merged check must equal the single replica's.
"""

from __future__ import annotations

import asyncio
import threading
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import uvicorn
from fastapi import FastAPI

from reliability.fuzz import fuzz_against
from reliability.loadgen import LoadPlan, loopback_address, run_load
from reliability.outcome import Outcome, format_table
from reliability.run import GROUPS, QUICK, main
from reliability.security import leaks_in_logs, logs_outcome
from reliability.server import free_port, wait_until
from reliability.workbench import ADMIN_TOKEN


def assert_passed(outcomes: list[Outcome]) -> None:
    assert outcomes
    assert all(o.passed for o in outcomes), format_table(outcomes)


@pytest.mark.parametrize("group", sorted(GROUPS))
def test_each_check_passes_at_the_quick_size(group: str, tmp_path: Path) -> None:
    outcomes = GROUPS[group](tmp_path, QUICK)
    logs = sorted(tmp_path.glob("*.log"))
    assert_passed([*outcomes, logs_outcome(logs, [ADMIN_TOKEN])] if logs else outcomes)


def test_the_runner_prints_the_table_and_writes_the_figures(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    # The runner's own job (choosing groups, the table, the JSON, the exit status), on groups that answer at once:
    # each real group runs in test_each_check_passes_at_the_quick_size.
    held = Outcome("crash safety: kill -9 loop", True, "3 trials")
    broken = Outcome("faults: flipped byte", False, "1 fault", ["served the damaged version"])
    monkeypatch.setitem(GROUPS, "crash", lambda workdir, size: [held])
    monkeypatch.setitem(GROUPS, "faults", lambda workdir, size: [broken])
    assert main(["--quick", "--only", "crash", "--json", str(tmp_path / "out.json")]) == 0
    printed = capsys.readouterr().out
    assert "crash safety: kill -9 loop" in printed
    assert "1 of 1 checks passed" in printed
    assert '"passed": true' in (tmp_path / "out.json").read_text()
    assert main(["--quick", "--only", "crash,faults"]) == 1
    printed = capsys.readouterr().out
    assert "1 of 2 checks passed" in printed
    assert "! served the damaged version" in printed
    with pytest.raises(SystemExit):
        main(["--only", "nothing"])


def test_the_log_check_finds_a_token_and_a_traceback(tmp_path: Path) -> None:
    log = tmp_path / "server.log"
    log.write_text(f'{{"event": "request"}}\nTraceback (most recent call last):\n  Bearer {ADMIN_TOKEN}\n')
    assert leaks_in_logs([log], [ADMIN_TOKEN]) == ["server.log contains a secret", "server.log contains a traceback"]


def test_the_load_generator_only_targets_loopback() -> None:
    assert loopback_address("http://127.0.0.1:8080") == ("127.0.0.1", 8080)
    for url in ("http://10.0.0.5:8080", "https://127.0.0.1:8443", "http://search.example"):
        with pytest.raises(ValueError, match="loopback"):
            loopback_address(url)
    with pytest.raises(ValueError, match="at least 1"):
        LoadPlan(clients=0, requests=10, batch=1)


@pytest.fixture
def faulty_server() -> Iterator[str]:
    """A tiny app that breaks its own schema: the checks must catch it (proof that they can fail)."""
    app = FastAPI()

    @app.post("/echo")
    async def echo(value: int) -> dict[str, int]:
        if value % 7 == 3:
            raise RuntimeError("planted server error")
        return {"value": value}

    port = free_port()
    server = uvicorn.Server(uvicorn.Config(app, host="127.0.0.1", port=port, log_level="critical"))
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    assert wait_until(lambda: server.started, 10.0)
    yield f"http://127.0.0.1:{port}"
    server.should_exit = True
    thread.join(10.0)


def test_the_fuzzer_and_the_load_generator_report_a_faulty_server(faulty_server: str) -> None:
    outcome = fuzz_against(faulty_server, max_examples=60, admin_token="unused", names=[])
    assert not outcome.passed
    assert any("/echo" in problem for problem in outcome.problems)
    # The load generator counts every non-200 answer as an error.
    plan = LoadPlan(clients=2, requests=20, batch=1)
    result = asyncio.run(run_load(faulty_server, "/echo?value=3", plan, [np.zeros((1, 2), dtype=np.float32)]))
    assert result.errors == 20
    assert result.completed == 0
