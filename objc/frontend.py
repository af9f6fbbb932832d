"""Spec text to checked objective: parse, resolve, check, in that order."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

from objc.checker import CheckedObjective, check
from objc.diagnostics import SCORE_FORM_CODE, Diagnostic, SpecError
from objc.resolve import resolve
from objc.source_text import SourceText, Span, decode_spec_bytes, first_unencodable, position_at
from objc.spec_parser import parse


def check_text(text: str, source_name: str = "<spec>") -> CheckedObjective:
    """Parse, resolve and check a spec. Raises SpecError for a spec that cannot be read or resolved;
    a readable spec that is not convex comes back with `errors` set and `accepted` False."""
    bad = first_unencodable(text)
    if bad is not None:
        # such text cannot be hashed, saved or written into a module: refused where it is
        span = position_at(text, bad)
        raise SpecError((Diagnostic("E002", f"the spec holds a character that is not valid text "
                                    f"(U+{ord(text[bad]):04X}, a lone surrogate) at line {span.line}, column "
                                    f"{span.column}", span, hint="remove it, or save the spec as UTF-8 text",
                                    source_name=source_name),),
                        SourceText(source_name, text.encode("utf-8", errors="replace").decode("utf-8"))) from None
    source = SourceText(source_name, text)
    tree = parse(source)
    try:
        resolved = resolve(tree, source)
        return _with_score_form(check(resolved, source))
    except RecursionError:
        # custom losses are inlined where used, so a long chain of them can nest deeper than the parser saw
        raise SpecError((Diagnostic("E106", "the spec nests too deeply once its custom losses are expanded",
                                    Span(1, 1, 1, 2), hint="define fewer losses in terms of each other",
                                    source_name=source_name),), source) from None


def _with_score_form(checked: CheckedObjective) -> CheckedObjective:
    """`checked` with an error (E306) when its score, affine to the checker, cannot be read as blocks
    of the learned parameters (objc/score_form.py): every backend and every metric reads the score that
    way, so no backend could train it, and `check` says so before any training."""
    spec = checked.spec
    # a score over classes has its own reading (the multiclass backends), not score_form's
    if checked.errors or spec.score is None or checked.task not in ("margin", "residual"):
        return checked
    from objc.score_form import score_form
    try:
        score_form(checked, tuple(spec.table.explicit_inputs() or ()) if spec.table is not None else ())
    except ValueError as err:
        return replace(checked, errors=checked.errors + (Diagnostic(
            SCORE_FORM_CODE, f"no backend can train this score: {err}", spec.score.span,
            hint="write the score as a sum of terms w . x, w[name] * data, a learned number, and data",
            source_name=checked.source.name),))
    return checked


def check_file(path: str | Path) -> CheckedObjective:
    """check_text on a file; a missing or unreadable file is a SpecError too."""
    p = Path(path)
    try:
        data = p.read_bytes()
    except FileNotFoundError:
        raise SpecError((Diagnostic("E001", f"spec file not found: {p}", Span(0, 0, 0, 0),
                                    hint="check the path", source_name=str(p)),)) from None
    except OSError as err:
        raise SpecError((Diagnostic("E002", f"cannot read spec file {p}: {err.strerror or err}", Span(0, 0, 0, 0),
                                    hint="check that the path is a readable file", source_name=str(p)),)) from None
    text, fault = decode_spec_bytes(data)
    if fault is not None:
        span, byte = fault
        raise SpecError((Diagnostic("E002", f"byte {byte} at line {span.line}, column {span.column} is not UTF-8 "
                                    "text; a spec is read as UTF-8", span,
                                    hint="save the spec as UTF-8 (an editor's 'save with encoding', or "
                                         "iconv -f latin1 -t utf-8 for a Latin-1 file)", source_name=str(p)),),
                        SourceText(str(p), text)) from None
    return check_text(text, str(p))
