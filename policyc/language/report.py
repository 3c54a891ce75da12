"""What ``policyc check --format json`` reports: one record per diagnostic (schemas/check-report.schema.json)."""

from __future__ import annotations

from collections.abc import Iterable

from pydantic import RootModel
from pydantic.dataclasses import dataclass

from policyc.language.diagnostics import Diagnostic, Severity, json_path

__all__ = ["CheckReportData", "DiagnosticRecord", "check_report"]


@dataclass(frozen=True)
class DiagnosticRecord:
    """A diagnostic as tools read it: the key path rendered JSONPath-style (``$.loss.juice.defect``)."""

    code: str
    severity: Severity
    message: str
    path: str
    file: str | None
    line: int | None
    col: int | None
    hint: str | None

    @classmethod
    def of(cls, diagnostic: Diagnostic) -> DiagnosticRecord:
        d = diagnostic
        return cls(d.code, d.severity, d.message, json_path(d.path), d.file, d.line, d.col, d.hint)


class CheckReportData(RootModel[tuple[DiagnosticRecord, ...]]):
    """Every diagnostic of every policy checked, in order."""


def check_report(diagnostics: Iterable[Diagnostic]) -> CheckReportData:
    return CheckReportData(tuple(DiagnosticRecord.of(d) for d in diagnostics))
