"""schemathesis against the live server's own OpenAPI schema: no 5xx, and every answer as the schema documents.

Every operation gets ``max_examples`` generated requests (valid and invalid
by the schema).  The checks: no server error, a documented status, a
documented content type and headers, and a body that matches the documented
schema for its status.  Hypothesis runs without its example database, so a
run leaves nothing behind; ``seed`` makes it repeatable.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable
from typing import Any

import hypothesis
import requests
import schemathesis
from hypothesis import strategies
from schemathesis import GenerationMode
from schemathesis.checks import not_a_server_error
from schemathesis.core.result import Err
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_headers_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from reliability.outcome import Outcome

CHECKS = [
    not_a_server_error,
    status_code_conformance,
    content_type_conformance,
    response_headers_conformance,
    response_schema_conformance,
]


def _summary(failure: BaseException) -> str:
    """The first lines of a failure, on one line."""
    text = " ".join(line.strip() for line in str(failure).splitlines() if line.strip())
    return f"{type(failure).__name__}: {text[:400]}"


def _exercise(
    operation: schemathesis.APIOperation[Any, Any, Any, Any],
    base_url: str,
    session: requests.Session,
    headers: dict[str, str] | None,
    names: list[str],
    statuses: Counter[int],
) -> Callable[[], None]:
    """A Hypothesis test of one operation: requests valid and invalid by the schema, every answer checked."""
    cases = strategies.one_of(
        operation.as_strategy(GenerationMode.POSITIVE), operation.as_strategy(GenerationMode.NEGATIVE)
    )

    @hypothesis.given(case=cases, served=strategies.sampled_from([*names, *names, None]))
    def exercise(case: schemathesis.Case[Any], served: str | None) -> None:
        if served is not None and "name" in case.path_parameters:
            case.path_parameters["name"] = served
        response = case.call(base_url=base_url, session=session, headers=headers)
        statuses[response.status_code] += 1
        case.validate_response(response, checks=CHECKS)

    return exercise


def fuzz_against(
    base_url: str, *, max_examples: int, admin_token: str, names: list[str], seed: int = 20261202
) -> Outcome:
    """Generate ``max_examples`` requests per operation of ``base_url``'s schema and check every answer.

    Parameters
    ----------
    names : list of str
        The served erasers: most generated ``{name}`` path parameters are
        replaced by one of them, so the fuzzer reaches past "unknown eraser".
    """
    schema = schemathesis.openapi.from_url(f"{base_url}/openapi.json")
    problems: list[str] = []
    statuses: Counter[int] = Counter()
    operations = 0
    with requests.Session() as session:
        for result in schema.get_all_operations():
            if isinstance(result, Err):
                problems.append(f"the schema has an invalid operation: {_summary(result.err())}")
                continue
            operation = result.ok()
            operations += 1
            # Admin calls carry the right token, so the authorised path is fuzzed too (refusals have their own table).
            headers = {"Authorization": f"Bearer {admin_token}"} if "/admin/" in operation.path else None
            exercise = _exercise(operation, base_url, session, headers, names, statuses)
            settings = hypothesis.settings(
                max_examples=max_examples,
                deadline=None,
                database=None,
                phases=[hypothesis.Phase.explicit, hypothesis.Phase.generate],
                suppress_health_check=list(hypothesis.HealthCheck),
            )
            try:
                settings(hypothesis.seed(seed)(exercise))()
            except (Exception, BaseExceptionGroup) as failure:  # failed checks come as a group
                problems.append(f"{operation.method.upper()} {operation.path}: {_summary(failure)}")
    answered = sum(statuses.values())
    figures = (
        f"{operations} operations, {answered} generated requests; statuses "
        + ", ".join(f"{status}×{count}" for status, count in sorted(statuses.items()))
        + f"; {sum(c for s, c in statuses.items() if s >= 500)} 5xx, {len(problems)} operations failing a check"
    )
    return Outcome("fuzzing: schemathesis on the OpenAPI schema", not problems, figures, problems)
