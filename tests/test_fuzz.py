"""Fuzzing every stage, and the limits of size and depth.

Two sources of specs, both seeded so every run sees the same texts:

* a grammar-aware generator: random derivations of grammar/objc.lark's own productions (read from
  the compiled parser, so a new rule is fuzzed without touching this file), with names taken from
  objc/catalog.py and numbers from a list of extremes (1e308, 1e-320, 0, 1e400, 1e-400, 5e-324,
  30-digit integers). Three shapes: whole specs derived from `start`; a valid header over a small
  table plus derived statements; a header plus a goal built of catalog losses and norms with
  extreme weights and settings (the shape most likely to be accepted and reach the backends);
* byte-level mutation of the example specs in specs/ (and specs/refused/): deletions, insertions,
  swaps, duplicated lines, non-UTF-8 bytes, a BOM, CR and CRLF line ends, tabs, NUL and every other
  control character, spread over the text.

Every spec is parsed; a large sample is resolved and checked; the accepted ones among a smaller
sample are bound to a small table written to a temporary folder, and both backends build their
module from a smaller sample still (the NumPy module takes a third of a second to lay out, so it
gets the fewest). Every outcome must be success or objc's own error (SpecError; the NumPy
backend's NotSupported, a refusal it raises before a SpecError is formed), and every diagnostic's
place is checked (see `place_problems`).

Counts of a default run (`DEFAULT_SPECS` = 20,000, seed `SEED`): 12,000 generated specs, all
parsed, and one in five of those that parse resolved and checked (about 2,200); 8,000 mutated
specs, one in three read and checked through `check_file` (so bytes that are not UTF-8 meet its
decoder), the others decoded and parsed; up to 300 accepted specs bound to their table, up to 200
given to the cvxpy module builder (and compiled) and 12 to the NumPy module builder. It takes about
45 s of CPU (70 s wall while the machine is shared). A longer run:
`OBJC_FUZZ_SPECS=200000 pytest tests/test_fuzz.py -k campaign` (the same seed and proportions; the
caps on binding and building grow with it, tenfold for 200,000).

`fuzz_figures(n_specs, seed)` runs the same campaign and returns its figures for docs/reliability.md.
"""

from __future__ import annotations

import os
import random
import re
import subprocess
import sys
import tempfile
import textwrap
import traceback
import warnings
from collections import Counter
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any, Callable, Protocol, Sequence

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as hst

from objc import SpecError, check_file, check_text
from objc.backends import cvxpy_problem, numpy_module
from objc.catalog import ENTRIES, GROUP_NORM
from objc.diagnostics import Diagnostic
from objc.source_text import SourceText, Span, decode_spec_bytes, position_at, split_lines
from objc.spec_parser import RESERVED_WORDS, _is_forbidden, _parser, parse
from objc.training import bind_training

ROOT = Path(__file__).resolve().parent.parent
SPECS = ROOT / "specs"
DEFAULT_SPECS = 20_000
N_SPECS = int(os.environ.get("OBJC_FUZZ_SPECS", DEFAULT_SPECS))
SEED = 20_261_202

# codes the parser gives (E107 control characters, E105 nesting, E101-E104 syntax, E100 internal)
# and the reader (E002 bytes that are not UTF-8): the stages whose place can be bounded by a mutation
SYNTAX_CODES = frozenset({"E002", "E100", "E101", "E102", "E103", "E104", "E105", "E107", "E108"})


# ---------------------------------------------------------------- choices: seeded random or hypothesis

class Chooser(Protocol):
    def random(self) -> float: ...
    def choice(self, seq: Sequence[Any]) -> Any: ...
    def randint(self, a: int, b: int) -> int: ...


class _DrawChooser:
    """The Chooser interface over hypothesis' `data.draw`, so the same generator shrinks on failure."""

    def __init__(self, data: Any) -> None:
        self._data = data

    def random(self) -> float:
        return self._data.draw(hst.floats(0, 1, exclude_max=True))

    def choice(self, seq: Sequence[Any]) -> Any:
        return self._data.draw(hst.sampled_from(list(seq)))

    def randint(self, a: int, b: int) -> int:
        return self._data.draw(hst.integers(a, b))


# ---------------------------------------------------------------- the grammar-aware generator

# Numbers at the edges of float64 and of the lexer: overflow to inf, underflow to 0, subnormals.
EXTREME_NUMBERS = ("0", "0.0", "1", "2", "0.5", ".5", "1e308", "1.7976931348623157e308", "1e309", "1e400",
                   "1e-320", "5e-324", "1e-400", "1e+99999", "1e-99999", "123456789012345678901234567890",
                   "0.000000000000000000001", "100", "0.9", "1.35", "3", "1e-12", "1E5", "0e0")
CATALOG_CALLS = tuple(e.name for e in ENTRIES) + (GROUP_NORM,)
CONTEXT_NAMES = ("w", "b", "s", "y", "x", "a", "c", "d", "label", "t", "C", "lam", "q", "m", "r", "u",
                 "v", "z", "_", "w2", "hinge", "l2sq", "A" * 200, "__init__", "import", "True")
STRINGS = ('"rows.csv"', '"a"', '"c"', '"label"', '"a b"', '"a*"', '"*"', '""', '"\\""', '"\\\\"', '"é"',
           '"\\u00e9"', '"' + "z" * 300 + '"', '"yes"', '"../rows.csv"', '"\\t"')
BAD_ESCAPES = ('"\\x"', '"\\N{bad}"', '"\\u12"')  # sentences of the grammar all the same: E108
SEPARATORS = (" ", " ", " ", "  ", "\n", "\n  ", "\t", " \n")


@lru_cache(maxsize=1)
def _grammar() -> tuple[dict[str, list[tuple[list[tuple[bool, str]], str | None]]], dict[str, Any], dict[str, int]]:
    """The compiled grammar as {rule: [(expansion [(is_terminal, name)], alias)]}, the terminals by
    name, and each rule's least derivation height (so a derivation past its depth can close)."""
    parser = _parser()
    rules: dict[str, list] = {}
    for r in parser.rules:
        rules.setdefault(r.origin.name, []).append(([(s.is_term, s.name) for s in r.expansion], r.alias))
    terminals = {t.name: t for t in parser.terminals}
    height = {name: 10 ** 9 for name in rules}
    changed = True
    while changed:
        changed = False
        for name, alts in rules.items():
            for exp, _ in alts:
                h = 1 + max([0] + [0 if term else height[s] for term, s in exp])
                if h < height[name]:
                    height[name], changed = h, True
    return rules, terminals, height


def terminal_text(name: str, rng: Chooser, in_call: bool) -> str:
    """Text for one terminal: literals as written; the regular terminals from the pools above."""
    term = _grammar()[1][name]
    if term.pattern.type == "str":
        return term.pattern.value
    if name == "NAME":
        if in_call and rng.random() < 0.9:
            return rng.choice(CATALOG_CALLS)
        return rng.choice(CONTEXT_NAMES) if rng.random() < 0.9 else rng.choice(CATALOG_CALLS)
    if name == "NUMBER":
        if rng.random() < 0.6:
            return rng.choice(EXTREME_NUMBERS)
        return str(rng.randint(0, 10 ** rng.randint(1, 25))) + rng.choice(("", ".25", "e3", "e-7", "E+30"))
    if name == "STRING":
        return rng.choice(STRINGS) if rng.random() < 0.98 else rng.choice(BAD_ESCAPES)
    if name == "COMPARE":
        return rng.choice(("<=", ">=", "=="))
    raise KeyError(f"no text generator for the grammar's terminal {name} ({term.pattern})")


def derive(symbol: str, rng: Chooser, depth: int, budget: list[int], out: list[str], in_call: bool = False) -> None:
    """A random derivation of `symbol` appended to `out` as tokens. Past `depth` levels or the token
    `budget`, only expansions of least height are taken, so the derivation always ends."""
    rules, _, height = _grammar()
    alts = rules[symbol]
    if depth <= 0 or budget[0] <= 0:
        least = min(1 + max([0] + [0 if t else height[s] for t, s in exp]) for exp, _ in alts)
        alts = [a for a in alts if 1 + max([0] + [0 if t else height[s] for t, s in a[0]]) == least]
    expansion, alias = rng.choice(alts)
    for k, (is_term, name) in enumerate(expansion):
        if is_term:
            budget[0] -= 1
            # the NAME that opens a call is a function name: mostly one the catalog knows
            out.append(terminal_text(name, rng, in_call=alias == "call" and k == 0))
        else:
            derive(name, rng, depth - 1, budget, out)


def join_tokens(tokens: list[str], rng: Chooser) -> str:
    return "".join(t + rng.choice(SEPARATORS) for t in tokens)


# A valid header over the table `write_table` makes: margin target, three inputs, w, b and s.
HEADER = ('table rows from "rows.csv"\n  target label: yes -> +1, no -> -1\n  inputs a, c, d\n'
          "learn w over inputs, b\nscore s = w . x + b\n")
RESIDUAL_HEADER = 'table rows from "rows.csv"\n  target t\n  inputs a, c, d\nlearn w over inputs, b\nscore s = w . x + b\n'
HEADER_EXTRAS = ("  standardize\n", "  holdout 20% seed 3\n", "  rowweight c\n", "  missing drop\n",
                 "  classweight +1 = 3, -1 = 1\n", "  feature e = log1p(a)\n", "  holdout 1e-320\n",
                 "  holdout 1e308% seed 1e400\n", "  group g = a, c\n", '  validate on "rows.csv"\n')


def write_table(folder: Path) -> None:
    """rows.csv: 40 rows, inputs a, c (positive, usable as a row weight), d, a yes/no label and a
    numeric target t; written by hand so the fuzz run needs no generator of its own."""
    lines = ["a,c,d,label,t"]
    for i in range(40):
        a, c, d = (i * 37 % 11) / 3.0, 1.0 + (i % 4), ((i * 13) % 7) - 3.0
        lines.append(f"{a:.3f},{c:.1f},{d:.1f},{'yes' if (a + d + i % 3) > 3 else 'no'},{a - 0.5 * d + i % 2:.2f}")
    (folder / "rows.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")


def _catalog_term(rng: Chooser, margin: bool) -> str:
    entry = rng.choice(ENTRIES)
    if entry.kind == "norm":
        arg = rng.choice(("w", "w", "w[a, c]", "b", "s", "(w - 1)"))
    elif entry.role == "margin" or (entry.role is None and margin):
        arg = rng.choice(("y * s", "y * s", "s * y", "1 - y * s", "-(y * s)"))
    else:
        arg = rng.choice(("y - s", "y - s", "s - y", "(y - s) / 2"))
    args = [arg] * (2 if entry.arity == 0 or entry.arity == 2 else max(1, entry.arity))
    for opt in entry.options:
        if rng.random() < 0.7:
            args.append(rng.choice((f"{opt.default:g}", rng.choice(EXTREME_NUMBERS), rng.choice(("t", "q", "C")))))
    call = f"{entry.name}({', '.join(args)})"
    if entry.kind != "norm":
        call = rng.choice(("mean ", "sum ", "perrow ", "")) + call
    weight = rng.choice(EXTREME_NUMBERS + ("C", "lam", "C * lam", "-1", "(1 - 1)"))
    return f"{weight} * {call}" if rng.random() < 0.8 else call


def generate_spec(rng: Chooser) -> tuple[str, str]:
    """(shape, spec text) for one generated spec; every shape is a sentence of the grammar."""
    shape = rng.choice(("grammar", "statements", "catalog", "catalog"))
    if shape == "grammar":
        out: list[str] = []
        derive("start", rng, rng.randint(3, 14), [rng.randint(5, 200)], out)
        return shape, join_tokens(out, rng)
    margin = rng.random() < 0.6
    head = HEADER if margin else RESIDUAL_HEADER
    extras = "".join(rng.choice(HEADER_EXTRAS) for _ in range(rng.randint(0, 2)))
    head = head.replace("learn", extras + "learn", 1)
    tunes = "".join(rng.choice(("tune C = 1 within 0.01 .. 100\n", "tune lam = 0.1 within 0 .. 1e308\n",
                                "tune q = 2 within 1.5 .. 4\n", "tune t = 0.5 within 0.1 .. 0.9\n",
                                "tune C = 1e-320 within 5e-324 .. 1e400\n"))
                    for _ in range(rng.randint(0, 2)))
    if shape == "statements":
        body: list[str] = []
        for _ in range(rng.randint(1, 4)):
            stmt = rng.choice(("goal_stmt", "goal_stmt", "keep_stmt", "loss_stmt", "tune_stmt", "feature_clause"))
            tokens: list[str] = []
            # nesting up to 60 levels, and now and then past the parser's limit of 100
            deep = rng.randint(2, 12) if rng.random() < 0.95 else rng.randint(100, 140)
            derive(stmt, rng, deep, [rng.randint(3, 60 if deep < 100 else 400)], tokens)
            body.append(join_tokens(tokens, rng) + "\n")
        return shape, head + tunes + "".join(body)
    terms = " + ".join(_catalog_term(rng, margin) for _ in range(rng.randint(1, 4)))
    keep = rng.choice(("", "", "keep abs(w) <= 5\n", "keep l1(w) <= 1e308\n", "keep w[a] >= 0\n", "keep b == 0\n"))
    return shape, head + tunes + f"goal {terms}\n" + keep


# ---------------------------------------------------------------- byte-level mutation of the examples

CONTROL_BYTES = [bytes([c]) for c in range(32)] + [b"\x7f"] + [chr(c).encode() for c in (0x85, 0x2028, 0x2029)]
PIECES = CONTROL_BYTES + [b"\xff", b"\xfe", b"\xc3", b"\xe2\x80", b"\xed\xa0\x80", b"\x80", b"\xef\xbb\xbf",
                          b"\r\n", b"\r", b"\t", b"\x00", b" ", b"\n", b"(", b")", b",", b'"', b"#", b"..",
                          b"1e400", b"goal", b"score", b"learn", b"table", b"mean", b"w", b"\\", "é".encode()]


def _seed_bytes() -> list[bytes]:
    return [p.read_bytes() for p in sorted(SPECS.glob("*.objc")) + sorted((SPECS / "refused").glob("*.objc"))]


def mutate(data: bytes, rng: Chooser) -> tuple[str, bytes, int]:
    """(kind, mutated bytes, index of the first byte that differs from `data`)."""
    n = len(data)
    kind = rng.choice(("delete", "insert", "insert", "replace", "swap", "duplicate_line", "control"))
    i = rng.randint(0, max(0, n - 1))
    if kind == "delete":
        j = min(n, i + rng.randint(1, 12))
        out = data[:i] + data[j:]
    elif kind in ("insert", "control"):
        piece = rng.choice(CONTROL_BYTES if kind == "control" else PIECES)
        out = data[:i] + piece + data[i:]
    elif kind == "replace":
        out = data[:i] + rng.choice(PIECES) + data[i + 1:]
    elif kind == "swap":
        j = min(n - 1, i + rng.randint(1, 40))
        out = data[:i] + data[j:j + 1] + data[i + 1:j] + data[i:i + 1] + data[j + 1:]
    else:
        lines = data.split(b"\n")
        k = rng.randint(0, len(lines) - 1)
        lines.insert(k, lines[k])
        out = b"\n".join(lines)
    first = next((k for k in range(min(len(out), n)) if out[k] != data[k]), min(len(out), n))
    return kind, out, first


def whole_text_variants(data: bytes) -> dict[str, bytes]:
    """Rewrites that keep every line and column: the same diagnostics must come out."""
    return {"crlf": data.replace(b"\n", b"\r\n"), "cr": data.replace(b"\n", b"\r"),
            "bom": b"\xef\xbb\xbf" + data, "tabs": data.replace(b"  ", b"\t ")}


# ---------------------------------------------------------------- what a diagnostic's place must be

_QUOTED = re.compile(r"^unexpected (?:character )?'(.*)'$")


def _shown(line: str) -> str:
    return "".join("?" if (ord(c) < 0x20 or 0x7F <= ord(c) <= 0x9F or ord(c) in (0x2028, 0x2029)) else c
                   for c in line.expandtabs(1))


def place_problems(diags: Sequence[Diagnostic], text: str, *, allow_unplaced: bool = False) -> list[str]:
    """What is wrong with the places of `diags` in `text` (empty when all is well).

    Sound for every diagnostic: the span starts on a line of the text (lines split at LF, CRLF and
    CR only) at a column from 1 to one past the line's end, and ends at or after it; the rendered
    caret line shows that very line and puts its first caret under the span's column; a message
    quoting the text it rejects ("unexpected 'X'") quotes exactly the text under the span; an E107
    points at the forbidden character it names. `allow_unplaced` admits a span of line 0 (a data
    error about the table as a whole)."""
    problems = []
    lines = split_lines(text)
    source = SourceText("fuzz.objc", text)
    for d in diags:
        sp = d.span
        tag = f"{d.code} at {sp.line}:{sp.column}-{sp.end_line}:{sp.end_column} ({d.message[:80]!r})"
        if sp.line == 0:
            if not allow_unplaced:
                problems.append(f"{tag}: no place")
            continue
        if not (1 <= sp.line <= len(lines) and 1 <= sp.column <= len(lines[sp.line - 1]) + 1):
            problems.append(f"{tag}: outside the text ({len(lines)} lines)")
            continue
        if (sp.end_line, sp.end_column) < (sp.line, sp.column) or sp.end_line > len(lines):
            problems.append(f"{tag}: ends before it starts or past the text")
        shown = source.render(sp).split("\n")
        gutter = f"{sp.line:>4} | "
        if shown[0] != gutter + _shown(lines[sp.line - 1]) or shown[1].index("^") != len(gutter) + sp.column - 1:
            problems.append(f"{tag}: caret drawn as {shown!r}")
        quoted = _QUOTED.match(d.message)
        if quoted and source.snippet(sp).replace("\t", " ") != quoted.group(1):
            problems.append(f"{tag}: message quotes {quoted.group(1)!r}, span holds {source.snippet(sp)!r}")
        if d.code == "E107":
            ch = lines[sp.line - 1][sp.column - 1]
            if not _is_forbidden(ch) or f"U+{ord(ch):04X}" not in d.message:
                problems.append(f"{tag}: the character there is {ch!r}")
    return problems


# ---------------------------------------------------------------- the campaign

@dataclass
class Campaign:
    """Outcomes by stage and kind, and the distinct failures (unexpected exceptions, bad places)."""

    outcomes: dict[str, Counter] = field(default_factory=dict)
    failures: dict[str, str] = field(default_factory=dict)  # signature -> first spec showing it

    def count(self, stage: str, kind: str) -> None:
        self.outcomes.setdefault(stage, Counter())[kind] += 1

    def fail(self, signature: str, text: str) -> None:
        self.failures.setdefault(signature, text)


def _kind(err: SpecError) -> str:
    return "SpecError " + ",".join(sorted({d.code for d in err.diagnostics}))


def _crash(campaign: Campaign, stage: str, text: str) -> None:
    etype, value, tb = sys.exc_info()
    where = traceback.extract_tb(tb)[-1]
    campaign.count(stage, f"crash {etype.__name__}")
    campaign.fail(f"{stage}: {etype.__name__} at {Path(where.filename).name}:{where.lineno}: {str(value)[:120]}", text)


def _run_stage(campaign: Campaign, stage: str, text: str, fn: Callable[[], Any],
               expected: tuple[type, ...] = ()) -> tuple[Any, SpecError | None]:
    """(fn()'s result or None, its SpecError or None), the outcome counted and every place checked."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # numerical warnings of the witness search are not failures
            result = fn()
    except SpecError as err:
        campaign.count(stage, _kind(err))
        if not err.diagnostics:
            campaign.fail(f"{stage}: SpecError without a diagnostic", text)
        for d in err.diagnostics:
            if d.code == "E100":  # the parser's "internal error": a crash wearing a diagnostic
                campaign.fail(f"{stage}: internal error E100: {re.sub(r'[0-9]+', '#', d.message)[:120]}", text)
        shown_text = err.source.text if err.source is not None else text
        for p in place_problems(err.diagnostics, shown_text, allow_unplaced=stage == "bind"):
            campaign.fail(f"{stage}: {re.sub(r'[0-9]+', '#', p)[:160]}", text)
        try:
            str(err)
        except Exception:  # rendering is part of the message the user sees
            _crash(campaign, stage + " render", text)
        return None, err
    except expected as err:
        campaign.count(stage, type(err).__name__)
        return None, None
    except Exception:
        _crash(campaign, stage, text)
        return None, None
    campaign.count(stage, "ok")
    return result, None


def _checked_places(campaign: Campaign, stage: str, checked: Any, text: str) -> None:
    for p in place_problems(list(checked.errors) + list(checked.warnings), text):
        campaign.fail(f"{stage}: {re.sub(r'[0-9]+', '#', p)[:160]}", text)


def _later_stages(campaign: Campaign, checked: Any, text: str, spec_dir: Path, caps: dict[str, int]) -> None:
    if not checked.accepted or caps["bind"] <= 0:
        return
    caps["bind"] -= 1
    bound, _ = _run_stage(campaign, "bind", text, lambda: bind_training(checked, spec_dir))
    if bound is None:
        return
    if caps["cvxpy"] > 0:
        caps["cvxpy"] -= 1
        names = bound[0].input_names
        src, _ = _run_stage(campaign, "cvxpy build", text, lambda: cvxpy_problem.emit_module(checked, names))
        if src is not None:
            _run_stage(campaign, "cvxpy compile", text, lambda: compile(src, "cvxpy_module", "exec"))
    if caps["numpy"] > 0:
        caps["numpy"] -= 1
        _run_stage(campaign, "numpy build", text, lambda: numpy_module.emit_module(checked),
                   expected=(numpy_module.NotSupported,))


def _syntax_place_bound(checked_diags: Sequence[Diagnostic], original: bytes, mutated_text: str, first: int,
                        ) -> str | None:
    """The first syntax diagnostic of a mutated spec lies at or after the token the mutation touched.

    Sound because the text before the first changed byte is the original's, which is a valid
    prefix: the lexer and the LALR parser read left to right and raise at the first token they
    cannot take, so no such token lies wholly before the change; the token that holds the change (or
    ends right at it, as `within` does when `x` is inserted after it) may start before it, so the
    bound is that token's start in the original. E105 is given for its whole statement, so only its
    end is bounded. Later diagnostics come after blanking a statement and are not bounded here;
    neither are resolver and checker errors, which may point at a declaration before a changed use."""
    syntax = [d for d in checked_diags if d.code in SYNTAX_CODES]
    if not syntax:
        return None
    d = syntax[0]
    text = original.decode("utf-8")
    index = len(original[:first].decode("utf-8", errors="ignore"))  # a split character counts as changed
    start = index
    for tok in _tokens(text):
        if tok.start_pos <= index <= tok.end_pos:
            start = min(start, tok.start_pos)
    if d.code == "E102":  # drawn under the last character before the end, trailing blanks left out
        while start > 0 and text[start - 1].isspace():
            start -= 1
    bound = position_at(mutated_text, start)
    # E105 covers its whole statement, and E102 (the text ends mid-statement) is raised at the end of
    # the text but drawn under its last character, which a deletion at the very end leaves before
    # the change (past the blanks before it): for both only the span's end is bounded
    at = (d.span.end_line, d.span.end_column) if d.code in ("E102", "E105") else (d.span.line, d.span.column)
    if at < (bound.line, bound.column):
        return f"{d.code} at {at} before the first change at {bound.line}:{bound.column}"
    return None


@lru_cache(maxsize=64)
def _tokens(text: str) -> tuple:
    return tuple(_parser().lex(text.replace("\t", " ")))


def run_campaign(n_specs: int, seed: int, folder: Path) -> Campaign:
    """The whole fuzz run on `n_specs` specs (3 in 5 generated, 2 in 5 mutated), in `folder`."""
    write_table(folder)
    campaign = Campaign()
    rng = random.Random(seed)
    scale = max(1, n_specs // DEFAULT_SPECS)
    caps = {"bind": 300 * scale, "cvxpy": 200 * scale, "numpy": 12 * scale}
    n_generated = n_specs * 3 // 5
    for k in range(n_generated):
        shape, text = generate_spec(rng)
        campaign.count("generated", shape)
        tree, err = _run_stage(campaign, "parse", text, lambda: parse(SourceText("fuzz.objc", text)))
        if err is not None and not {d.code for d in err.diagnostics} <= {"E105", "E108"}:
            # a sentence of the grammar is never a syntax error: only too deep, or a bad string escape
            campaign.fail(f"parse: a sentence of the grammar refused with {sorted({d.code for d in err.diagnostics})}",
                          text)
        if tree is None or k % 5:
            continue
        checked, _ = _run_stage(campaign, "check", text, lambda: check_text(text, "fuzz.objc"))
        if checked is not None:
            _checked_places(campaign, "check", checked, text)
            _later_stages(campaign, checked, text, folder, caps)
    seeds = _seed_bytes()
    spec_file = folder / "mutated.objc"
    for k in range(n_specs - n_generated):
        original = seeds[k % len(seeds)]
        kind, data, first = mutate(original, rng)
        campaign.count("mutated", kind)
        spec_file.write_bytes(data)
        text = data.decode("utf-8", errors="replace")
        if k % 3:  # two in three parsed only, after the reader's own decoding
            decoded, fault = decode_spec_bytes(data)
            if fault is None:
                _, err = _run_stage(campaign, "parse mutated", decoded, lambda: parse(SourceText("fuzz.objc", decoded)))
                problem = _syntax_place_bound(list(err.diagnostics) if err else [], original, decoded, first)
                if problem:
                    campaign.fail(f"mutated {kind}: {re.sub(r'[0-9]+', '#', problem)}", text)
            continue
        checked, err = _run_stage(campaign, "check mutated", text, lambda: check_file(spec_file))
        diags = list(err.diagnostics) if err is not None else []
        if checked is not None:
            diags = list(checked.errors)
            _checked_places(campaign, "check mutated", checked, text)
            _later_stages(campaign, checked, text, SPECS, caps)
        problem = _syntax_place_bound(diags, original, text, first)
        if problem:
            campaign.fail(f"mutated {kind}: {re.sub(r'[0-9]+', '#', problem)}", text)
    return campaign


def fuzz_figures(n_specs: int, seed: int) -> dict:
    """Run the fuzz campaign of this module on `n_specs` specs from `seed` and return its figures.

    The result (plain JSON-ready values; the same for the same arguments):
      "specs": n_specs; "generated": specs from the grammar-aware generator (3/5 of n_specs),
      "mutated": byte-level mutations of the example specs (the rest);
      "generated_by_shape": {shape: count} for shapes "grammar", "statements", "catalog";
      "mutated_by_kind": {kind: count} for "delete", "insert", "replace", "swap", "duplicate_line",
      "control";
      "stages": {stage: {outcome: count}} with stages "parse" (generated specs), "check" (the
      sample of those resolved and checked), "parse mutated" and "check mutated" (mutated specs
      parsed only, or read and checked by `check_file`), "bind", "cvxpy build", "cvxpy compile",
      "numpy build" (a stage a run never reached is absent); an outcome is "ok", "SpecError " followed by the
      sorted distinct codes of its diagnostics (e.g. "SpecError E101,E104"), "NotSupported" (the
      NumPy backend's refusal) or "crash " followed by the exception's type;
      "specs_per_stage": {stage: total count over its outcomes};
      "failures": the number of distinct failures (an exception other than objc's own, or a
      diagnostic whose place is wrong), each signature counted once;
      "failure_signatures": those signatures, sorted (empty when objc passed).
    Runs in a temporary folder it removes; about 2 ms of CPU per spec (20,000 specs: 45 s)."""
    with tempfile.TemporaryDirectory() as tmp:
        campaign = run_campaign(n_specs, seed, Path(tmp))
    stages = {s: dict(sorted(c.items())) for s, c in campaign.outcomes.items() if s not in ("generated", "mutated")}
    return {
        "specs": n_specs,
        "generated": sum(campaign.outcomes.get("generated", Counter()).values()),
        "mutated": sum(campaign.outcomes.get("mutated", Counter()).values()),
        "generated_by_shape": dict(sorted(campaign.outcomes.get("generated", Counter()).items())),
        "mutated_by_kind": dict(sorted(campaign.outcomes.get("mutated", Counter()).items())),
        "stages": stages,
        "specs_per_stage": {s: sum(c.values()) for s, c in stages.items()},
        "failures": len(campaign.failures),
        "failure_signatures": sorted(campaign.failures),
    }


# ---------------------------------------------------------------- the tests

def _report(campaign: Campaign) -> str:
    return "\n".join(f"{sig}\n    spec: {text[:400]!r}" for sig, text in sorted(campaign.failures.items()))


def test_fuzz_campaign(tmp_path: Path) -> None:
    """N_SPECS specs (20,000 by default: 12,000 generated, 8,000 mutated; see the module docstring
    for the sample each later stage gets) through every stage they reach; no exception but objc's
    own, every place right."""
    campaign = run_campaign(N_SPECS, SEED, tmp_path)
    assert sum(campaign.outcomes["parse"].values()) + sum(campaign.outcomes["mutated"].values()) >= N_SPECS
    # the run must reach every stage, or it proves nothing about the later ones
    for stage in ("check", "check mutated", "bind", "cvxpy build", "numpy build"):
        assert campaign.outcomes.get(stage, {}).get("ok", 0) > 0, (stage, campaign.outcomes.get(stage))
    assert not campaign.failures, _report(campaign)


def test_every_terminal_of_the_grammar_has_a_generator() -> None:
    # a terminal added to the grammar must be fuzzed too: this fails until terminal_text knows it
    rng = random.Random(1)
    rules, terminals, _ = _grammar()
    used = {name for alts in rules.values() for exp, _ in alts for is_term, name in exp if is_term}
    for name in sorted(used):
        text = terminal_text(name, rng, in_call=False)
        assert re.fullmatch(terminals[name].pattern.to_regexp(), text), (name, text)
    # a name from the pools is never a keyword, or "sentences of the grammar" would not be ones
    assert not set(CONTEXT_NAMES + CATALOG_CALLS) & set(RESERVED_WORDS)


def test_place_problems_catches_wrong_places() -> None:
    # the place check itself must be able to fail: spans off the text, a caret on the wrong line's
    # text, and a quote that is not what the span holds are each reported
    text = "goal a\r\nkeep b $\n"
    right = Diagnostic("E101", "unexpected character '$'", Span(2, 8, 2, 9))
    assert place_problems([right], text) == []
    wrong = [Diagnostic("E101", "unexpected character '$'", Span(3, 8, 3, 9)),
             Diagnostic("E101", "unexpected character '$'", Span(2, 7, 2, 8)),
             Diagnostic("E103", "unexpected 'keep'", Span(1, 1, 1, 5)),
             Diagnostic("E201", "no place", Span(0, 0, 0, 0)),
             Diagnostic("E107", "U+0000 (NUL) is not allowed", Span(1, 2, 1, 3))]
    assert len(place_problems(wrong, text)) == 5
    assert len(place_problems(wrong[3:4], text, allow_unplaced=True)) == 0


def test_fuzz_figures_reports_stages_and_failures() -> None:
    figures = fuzz_figures(60, 7)
    assert (figures["specs"], figures["generated"] + figures["mutated"]) == (60, 60)
    assert figures["specs_per_stage"]["parse"] == figures["generated"]
    assert figures["failures"] == len(figures["failure_signatures"]) == 0, figures["failure_signatures"]


@settings(max_examples=300, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(hst.data())
def test_generated_specs_under_hypothesis(data) -> None:
    # the same generator driven by hypothesis, so a failure shrinks to a small spec
    shape, text = generate_spec(_DrawChooser(data))
    try:
        checked = check_text(text, "fuzz.objc")
    except SpecError as err:
        assert not place_problems(err.diagnostics, text), place_problems(err.diagnostics, text)
        assert {d.code for d in err.diagnostics if d.code.startswith("E1")} <= {"E105", "E108"}, str(err)
    else:
        assert not place_problems(list(checked.errors) + list(checked.warnings), text)


@pytest.mark.parametrize("path", sorted(SPECS.glob("*.objc")) + sorted((SPECS / "refused").glob("*.objc")),
                         ids=lambda p: p.name)
def test_line_ends_bom_and_tabs_keep_every_place(path: Path, tmp_path: Path) -> None:
    # CRLF, CR, a leading BOM and tabs for spaces keep every line and column, so the outcome must be
    # the same diagnostics at the same places (the one line rule: LF, CRLF or CR end a line)
    def outcome(data: bytes) -> list[tuple]:
        f = tmp_path / "v.objc"
        f.write_bytes(data)
        try:
            checked = check_file(f)
        except SpecError as err:
            return [(d.code, d.span.line, d.span.column) for d in err.diagnostics]
        return [(d.code, d.span.line, d.span.column) for d in checked.errors + checked.warnings]
    data = path.read_bytes()
    want = outcome(data)
    for name, variant in whole_text_variants(data).items():
        assert outcome(variant) == want, name


# ---------------------------------------------------------------- regression examples found by the fuzzing

# ---------------------------------------------------------------- limits

LIMIT_TIMEOUT = 120  # seconds per limit case: a hang guard only, the cases take a few seconds each


def _run_limit(code: str, tmp_path: Path) -> subprocess.CompletedProcess:
    """Run `code` in a fresh interpreter (so a RecursionError, MemoryError or hang cannot hurt this
    one) with a generous timeout; it prints its outcome's kind on the last line."""
    script = tmp_path / "limit.py"
    script.write_text(textwrap.dedent(code), encoding="utf-8")
    return subprocess.run([sys.executable, str(script)], cwd=tmp_path, capture_output=True, text=True,
                          timeout=LIMIT_TIMEOUT)


_LIMIT_PRELUDE = """
import sys, warnings
from pathlib import Path
warnings.simplefilter("ignore")
from objc import SpecError, check_text
from objc.training import bind_training
from objc.backends import cvxpy_problem
HEADER = 'table rows from "rows.csv"\\n  target label: yes -> +1, no -> -1\\n  inputs a, c, d\\nlearn w over inputs, b\\nscore s = w . x + b\\n'
def outcome(text, bind=False, build=True):
    try:
        checked = check_text(text, "limit.objc")
        if bind and checked.accepted:
            data, _, _ = bind_training(checked, Path("."))
            if build:
                cvxpy_problem.emit_module(checked, data.input_names)
    except SpecError as err:
        d = err.diagnostics[0]
        assert d.span.line >= 1 and d.span.column >= 1, d
        str(err)
        print("error", d.code, d.span.line, d.span.column)
        return
    print("ok", checked.accepted)
"""

LIMIT_CASES = {
    # (code after the prelude, the outcomes allowed on the last line)
    "nesting 5000 parentheses": ("outcome(HEADER + 'goal ' + '(' * 5000 + 'l2sq(w)' + ')' * 5000)",
                                 ("ok True",)),  # parentheses add no level to the tree
    "nesting 5000 unary minus": ("outcome(HEADER + 'goal ' + '- ' * 5000 + 'l2sq(w)')", ("error E105 6 1",)),
    "nesting 5000 calls": ("outcome(HEADER + 'goal ' + 'abs(' * 5000 + 'w' + ')' * 5000)", ("error E105 6 1",)),
    "nesting 3000 powers": ("outcome(HEADER + 'goal ' + 'l2sq(w)' + ' ^ 1' * 3000)", ("error E105 6 1",)),
    "a 1 MB comment line": ("outcome(HEADER + '# ' + 'x' * 1_000_000 + '\\ngoal l2sq(w)\\n')", ("ok True",)),
    # a flat sum is a left-leaning tree as deep as it has terms: past 100 it is refused where it starts
    "10,000 terms": ("outcome(HEADER + 'goal ' + ' + '.join(['0.5 * l2sq(w)'] * 10_000))", ("error E105 6 1",)),
    "40 terms": ("outcome(HEADER + 'goal ' + ' + '.join(['0.5 * l2sq(w)'] * 40), bind=True)", ("ok True",)),
    "a 1 MB name": ("outcome(HEADER + 'goal l2sq(' + 'w' * 1_000_000 + ')')", ("error E2",)),
    "a 1 MB string": ("outcome('table rows from \"' + 'r' * 1_000_000 + '\"\\n' + HEADER[27:] + 'goal l2sq(w)')", ("ok True",)),
    "thousands of statements": ("outcome(HEADER + ''.join(f'keep w[a] >= -{k}\\n' for k in range(3000)) + 'goal l2sq(w)', bind=True)", ("ok True",)),
    "thousands of inputs": ("outcome(HEADER.replace('inputs a, c, d', 'inputs ' + ', '.join(f'i{k}' for k in range(5000))) + 'goal l2sq(w)')", ("ok True",)),
}


@pytest.mark.parametrize("case", sorted(LIMIT_CASES))
def test_limits(case: str, tmp_path: Path) -> None:
    code, allowed = LIMIT_CASES[case]
    write_table(tmp_path)
    done = _run_limit(_LIMIT_PRELUDE + code, tmp_path)
    assert done.returncode == 0, done.stderr[-3000:]
    last = done.stdout.strip().splitlines()[-1]
    assert last.startswith(allowed), (last, done.stderr[-2000:])


def test_a_header_of_100000_columns(tmp_path: Path) -> None:
    # 100,000 columns in a CSV header, all of them inputs: read and bound (about 10 s, in the table
    # reader), or refused with a located error
    names = ["label"] + [f"col{k}" for k in range(100_000)]
    rows = [",".join(names)] + [",".join(["yes" if r % 2 else "no"] + [str((r * k) % 7) for k in range(100_000)])
                                for r in range(6)]
    (tmp_path / "wide.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    code = _LIMIT_PRELUDE + """
text = HEADER.replace('"rows.csv"', '"wide.csv"').replace('inputs a, c, d', 'inputs all except label') + 'goal mean hinge(y * s) + l2sq(w)'
outcome(text, bind=True, build=False)
"""
    done = _run_limit(code, tmp_path)
    assert done.returncode == 0, done.stderr[-3000:]
    assert done.stdout.split() == ["ok", "True"], done.stdout + done.stderr[-2000:]
