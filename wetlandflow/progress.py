"""Progress that suits both terminals and notebooks, and stays on screen when a step ends.

A finished bar is left in place with the step's elapsed seconds (``cross-validating: 100% 5/5 fold, done in
12.3 s``), and a run's steps each print a start line and a finished line with their seconds to standard
error, so a log or a scrolled-back terminal shows where the time went.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from typing import Generic, TypeVar

T = TypeVar("T")


def done_text(seconds: float) -> str:
    """``"done in 12.3 s"``: how every finished step and bar states its time."""
    return f"done in {seconds:.1f} s"


class _Bar(Generic[T]):
    """A tqdm bar over ``items`` that, once exhausted, stays visible with ``done in N s`` as its postfix."""

    def __init__(self, bar, items: Iterable[T]):
        self._bar, self._items = bar, items

    def __len__(self) -> int:
        return len(self._bar)

    def __iter__(self) -> Iterator[T]:
        # the items are iterated here, not by tqdm, which would close the bar before the time is added
        t0 = time.perf_counter()
        finished = False
        try:
            for item in self._items:
                yield item
                self._bar.update(1)
            finished = True
        finally:
            if finished and not self._bar.disable:
                self._bar.set_postfix_str(done_text(time.perf_counter() - t0))
            self._bar.close()


def progress_bar(items: Iterable[T], *, desc: str, unit: str = "it", disable: bool = False,
                 total: int | None = None) -> Iterable[T]:
    """Wrap ``items`` in a tqdm bar (the notebook widget inside Jupyter, text on standard error elsewhere).

    The bar stays when done, with the elapsed seconds; a bar left by an error or a cancel is closed as is.
    """
    from tqdm.auto import tqdm

    if total is None and hasattr(items, "__len__"):
        total = len(items)  # type: ignore[arg-type]
    return _Bar(tqdm(desc=desc, unit=unit, disable=disable, total=total, leave=True), items)


def say(text: str, *, enabled: bool = True) -> None:
    """One progress line on standard error, written so that it does not break an active bar."""
    if not enabled:
        return
    from tqdm.auto import tqdm

    tqdm.write(text, file=sys.stderr)
    sys.stderr.flush()


@contextmanager
def step_lines(name: str, *, enabled: bool = True):
    """``name ...`` when a step starts and ``name: done in N s`` (or ``failed after N s``) when it ends."""
    say(f"{name} ...", enabled=enabled)
    t0 = time.perf_counter()
    try:
        yield
    except BaseException:
        say(f"{name}: stopped after {time.perf_counter() - t0:.1f} s", enabled=enabled)
        raise
    say(f"{name}: {done_text(time.perf_counter() - t0)}", enabled=enabled)
