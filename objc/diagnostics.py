"""One diagnostic shape for every stage, and the one error type that carries them."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

from objc.source_text import NO_SPAN, SourceText, Span

Severity = Literal["error", "warning", "note"]


@dataclass(frozen=True)
class Diagnostic:
    code: str
    message: str
    span: Span = NO_SPAN
    severity: Severity = "error"
    hint: str = ""
    notes: tuple[str, ...] = ()
    source_name: str = ""

    def render(self, source: SourceText | None = None) -> str:
        where = self.source_name or (source.name if source else "")
        loc = f"{where}:{self.span.line}:{self.span.column}" if self.span.line else where
        head = f"{loc}: {self.severity} [{self.code}] {self.message}" if loc else f"{self.severity} [{self.code}] {self.message}"
        parts = [head]
        if source is not None and self.span.line:
            parts.append(source.render(self.span))
        parts.extend(f"  note: {n}" for n in self.notes)
        if self.hint:
            parts.append(f"  fix: {self.hint}")
        return "\n".join(parts)

    def to_json(self, source: SourceText | None = None) -> dict:
        return {
            "code": self.code,
            "severity": self.severity,
            "message": self.message,
            "file": self.source_name or (source.name if source else ""),
            "line": self.span.line,
            "column": self.span.column,
            "end_line": self.span.end_line,
            "end_column": self.span.end_column,
            "text": source.snippet(self.span) if source is not None else "",
            "hint": self.hint,
            "notes": list(self.notes),
        }


@dataclass
class SpecError(Exception):
    """The one error objc raises for a wrong spec or wrong data; it carries every problem found."""

    diagnostics: tuple[Diagnostic, ...]
    source: SourceText | None = None
    warnings: tuple[Diagnostic, ...] = field(default=())

    def __post_init__(self) -> None:
        super().__init__(self.render())

    def render(self) -> str:
        return "\n".join(d.render(self.source) for d in self.diagnostics)

    def __str__(self) -> str:
        return self.render()


def fail(code: str, message: str, span: Span = NO_SPAN, hint: str = "", source: SourceText | None = None,
         source_name: str = "") -> SpecError:
    """Build a SpecError with a single diagnostic (callers `raise fail(...)`)."""
    return SpecError((Diagnostic(code, message, span, "error", hint, (), source_name),), source)



# a score the checker calls affine that the score's decomposition (objc/score_form.py), which every
# backend and every metric uses, cannot read: an error of `objc check` itself
SCORE_FORM_CODE = "E306"

# A backend's refusal of a spec the checker accepts, by kind, and its code (docs/language.md
# section 14). The NumPy backend raises `NotSupported` with one of these kinds; `objc check` reports it
# before any training (W321 names the code) and `objc fit` / `objc build` refuse with the same code.
NUMPY_REFUSAL_CODES: dict[str, str] = {
    "constraint": "E403",  # a `keep` it cannot project on (not a sign, bound, box, L1 or L2 ball)
    "expression": "E405",  # a piece of a term it has no derivative for (data or x inside a penalty, ...)
    "penalty": "E407",  # a penalty term that reads several (or no) selections of the learned parameters
    "aggregate": "E408",  # a term mixing per-row aggregates with other expressions
    "feature": "E409",  # a feature the generated module cannot compute
    "score": SCORE_FORM_CODE,
}
