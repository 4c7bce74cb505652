"""Terminal progress bars (tqdm, on stderr) for :mod:`veil.progress` reports."""

from __future__ import annotations

from types import TracebackType
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from tqdm import tqdm


class ProgressBars:
    """One bar per reported stage; a context manager that closes them all."""

    def __init__(self, *, enabled: bool) -> None:
        self.enabled = enabled
        self._bars: dict[str, tqdm] = {}

    def __call__(self, stage: str, done: int, total: int | None) -> None:
        if not self.enabled:
            return
        bar = self._bars.get(stage)
        if bar is None:
            from tqdm import tqdm  # imported with the first bar: most commands draw none

            bar = self._bars[stage] = tqdm(total=total, desc=stage, leave=False, dynamic_ncols=True)
        bar.update(done - bar.n)
        if total is not None and done >= total:
            bar.refresh()  # tqdm skips updates within 0.1 s of the last; a finished stage shows as finished
            # A finished stage gives its line back: tqdm hides bars beyond the screen's height (20 lines when it
            # cannot tell), and a fit reports more stages than that.
            bar.close()
            del self._bars[stage]

    def __enter__(self) -> ProgressBars:
        return self

    def __exit__(
        self, kind: type[BaseException] | None, error: BaseException | None, trace: TracebackType | None
    ) -> None:
        for bar in self._bars.values():
            bar.close()
        self._bars.clear()
