"""How one session's replay went, as `chargebook replay` reports it among several."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any


@dataclass
class Outcome:
    """How one session's replay went: its exit status, and its report or why there is none."""

    session_id: int
    status: int
    report: Any = None  # ReplayReport
    error: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """Return the outcome as JSON-ready data: the report's, or the error's."""
        if self.report is not None:
            return {**self.report.to_dict(), "exit_status": self.status}
        return {"original_session_id": self.session_id, "error": self.error,
                "exit_status": self.status}  # fmt: skip
