"""Progress bars that suit both terminals and notebooks."""

from __future__ import annotations

from collections.abc import Iterable
from typing import TypeVar

T = TypeVar("T")


def progress_bar(items: Iterable[T], *, desc: str, unit: str = "it", disable: bool = False,
                 total: int | None = None) -> Iterable[T]:
    """Wrap ``items`` in a tqdm bar (the notebook widget inside Jupyter, text elsewhere)."""
    from tqdm.auto import tqdm

    return tqdm(items, desc=desc, unit=unit, disable=disable, total=total, leave=False)
