"""How a stage reports progress to whoever runs the night (the command line's bars)."""

from __future__ import annotations

from collections.abc import Callable

Progress = Callable[[str, int, int], None]  # (stage, done, total)


def no_progress(stage: str, done: int, total: int) -> None:
    return None
