"""Security properties checked on the code and on a live server's answers and logs."""

from __future__ import annotations

import re
from collections.abc import Iterable, Sequence
from pathlib import Path

import httpx

from reliability.outcome import Outcome

ROOT = Path(__file__).resolve().parent.parent
PACKAGES = (ROOT / "service" / "veil", ROOT / "client" / "veil_client")
# Loading a pickle runs code: nothing in veil may ever do it.
UNPICKLING = re.compile(
    r"\bimport pickle\b|\bfrom pickle\b|allow_pickle\s*=\s*True|\bpickle\.loads?\(|\bdill\b|joblib\.load"
)


def unpickling_lines(packages: Iterable[Path] = PACKAGES) -> list[str]:
    """Every line of the packages that could unpickle, and every ``np.load`` not saying ``allow_pickle=False``."""
    offenders = []
    for package in packages:
        for path in sorted(package.rglob("*.py")):
            for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
                if UNPICKLING.search(line) or ("np.load(" in line and "allow_pickle=False" not in line):
                    offenders.append(f"{path.relative_to(package.parent)}:{number}: {line.strip()}")
    return offenders


def _leaks(name: str, text: str, secrets: Sequence[str]) -> list[str]:
    found = [f"{name} contains a secret" for secret in secrets if secret in text]
    if "Traceback (most recent call last)" in text:
        found.append(f"{name} contains a traceback")
    return found


def _read(log: Path) -> str:
    return log.read_text(encoding="utf-8", errors="replace")


def leaks_in_logs(logs: Sequence[Path], secrets: Sequence[str]) -> list[str]:
    """Secrets or tracebacks found in server logs."""
    return [leak for log in logs for leak in _leaks(log.name, _read(log), secrets)]


def cors_refused(base_url: str) -> list[str]:
    """A cross-origin preflight to a server without configured origins gets no CORS grant."""
    preflight = {"Origin": "https://search.example", "Access-Control-Request-Method": "POST"}
    response = httpx.options(f"{base_url}/v1/erasers/planted/apply", headers=preflight, timeout=10.0)
    return ["a cross-origin preflight was granted"] if "access-control-allow-origin" in response.headers else []


def code_and_cors_outcome(base_url: str) -> Outcome:
    modules = sum(1 for package in PACKAGES for _ in package.rglob("*.py"))
    problems = unpickling_lines() + cors_refused(base_url)
    figures = (
        f"{modules} modules grepped for unpickling; a cross-origin preflight sent to the live server "
        "(admin refusals are in the bad-input table)"
    )
    return Outcome("security: code and CORS", not problems, figures, problems)


def logs_outcome(logs: Sequence[Path], secrets: Sequence[str]) -> Outcome:
    texts = {log.name: _read(log) for log in logs}
    problems = [leak for name, text in texts.items() for leak in _leaks(name, text, secrets)]
    lines = sum(len(text.splitlines()) for text in texts.values())
    figures = f"{len(logs)} server logs, {lines:,} lines, searched for the admin token and for tracebacks"
    return Outcome("security: server logs", not problems, figures, problems)
