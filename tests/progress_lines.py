"""An ingest's progress view for tests that only want its lines."""

from __future__ import annotations

from collections.abc import Callable


class ReportedLines:
    """A view that shows the lines only, each handed to ``report``."""

    def __init__(self, report: Callable[[str], None]) -> None:
        self._report = report

    def report(self, line: str) -> None:
        self._report(line)

    def begin(self, documents: int) -> None:
        return None

    def advance(self, documents: int) -> None:
        return None

    def rate(self, chunks: int, per_second: float) -> None:
        return None
