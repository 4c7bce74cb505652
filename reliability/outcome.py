"""One line of the reliability table, and the table itself."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field


@dataclass(frozen=True)
class Outcome:
    """What one check measured, and whether it held."""

    check: str
    passed: bool
    figures: str
    problems: list[str] = field(default_factory=list)


def format_table(outcomes: Sequence[Outcome]) -> str:
    width = max(len(o.check) for o in outcomes)
    lines = [f"{'check':<{width}}  result  figures", f"{'-' * width}  ------  -------"]
    for outcome in outcomes:
        lines.append(f"{outcome.check:<{width}}  {'pass' if outcome.passed else 'FAIL':<6}  {outcome.figures}")
        lines.extend(f"{'':<{width}}          ! {problem}" for problem in outcome.problems[:5])
    return "\n".join(lines)
