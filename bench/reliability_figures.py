"""Regenerate docs/reliability.md from a run: the fuzz campaign's figures, the broken-table corpus
run through both doors, the fault-injection tests, and the defects they found.

    python bench/reliability_figures.py                 # rewrites docs/reliability.md
    python bench/reliability_figures.py --stdout        # prints it instead
    python bench/reliability_figures.py --fuzz-specs N  # a shorter or longer fuzz run (default: CI's)

Every number in the file comes from this run; nothing is typed in by hand except the list of
defects (what was wrong, and the test that now guards it), whose tests are run here too.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import subprocess
import sys
import tempfile
import xml.etree.ElementTree as ET
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

FAULT_FILES = {
    "interrupted and failed runs": "tests/test_interrupts.py",
    "code safety": "tests/backends/test_code_safety.py",
    "reproducibility": "tests/test_reproducibility.py",
}

# each defect these tests found, what it did, and the test that guards the fix (file::name, or a
# corpus case id); the generator reports whether that test passes in this run
DEFECTS = [
    ("a CSV record with one field more than the header made pandas use the first column as the index: "
     "every name shifted one column, reported as a wrong column not being numeric", "T102",
     "corpus:ragged-one-extra-field"),
    ("an empty header cell became pandas' invented name 'Unnamed: N', which `inputs all` would pick",
     "T104", "corpus:empty-name"),
    ("a trailing separator on every line (an empty last column) was read as a column named 'Unnamed: N'",
     "T104", "corpus:trailing-separator"),
    ("values near the float limit under `standardize`: the spread overflowed to inf and the column was "
     "divided to zero in silence (with NumPy's overflow warning on stderr)", "T150", "corpus:overflowing-standardize"),
    ("a Latin-1 or UTF-16 CSV was refused with the codec's message (a byte offset in a read buffer), "
     "no line and no way out", "T102", "corpus:latin1-bytes"),
    ("thousands separators (\"1,000\") got no hint of what was wrong", "T112", "corpus:thousands-separator"),
    ("a read-only folder, a folder in place of the output file or a full disk ended as an "
     "'internal error' (an OSError) instead of a located message", "M507",
     "tests/test_interrupts.py::test_full_disk"),
    ("an output path naming a device or a pipe would have been replaced by a regular file (the staged "
     "file renamed over the node)", "M507", "tests/test_interrupts.py::test_output_that_is_a_device_or_pipe_is_refused"),
    ("the arrays file was renamed into place before the JSON was staged: an interruption between them "
     "left arrays without a model", "-", "tests/test_interrupts.py::test_interrupt_while_staging_the_second_file_leaves_nothing"),
    ("Ctrl-C between the two renames could leave a new .npz beside an old .json", "-",
     "tests/test_interrupts.py::test_renames_hold_ctrl_c_until_both_files_are_in_place"),
    ("after Ctrl-C objc said 'nothing was written' even when it came after the model was saved", "-",
     "tests/test_interrupts.py::test_fit_interrupted_leaves_nothing_or_a_complete_model[SIGINT]"),
    ("a fit that ran out of its pass budget was saved like a finished one (no pass budget on the "
     "command line at all)", "E404", "tests/test_interrupts.py::test_pass_budget_running_out_writes_nothing"),
    ("saved models held the fit's wall-clock seconds inside the hashed document, so no two runs gave "
     "the same file", "-",
     "tests/test_reproducibility.py::test_models_are_byte_identical_across_runs_and_processes[numpy]"),
]


def _run_corpus() -> dict:
    """Every corpus case through bind_table and `objc fit --json`, tallied against its expectation."""
    import test_tables_corpus as corpus
    from objc.cli import main
    from objc.diagnostics import SpecError
    from objc.frontend import check_text
    from objc.tables import bind_table
    from objc.training import task_of

    results = []
    for case in corpus.CORPUS:
        with tempfile.TemporaryDirectory() as tmp:
            root = Path(tmp)
            corpus._materialize(root, case)
            checked = check_text((root / "s.objc").read_text(encoding="utf-8"), "s.objc")
            try:
                data = bind_table(checked.spec.table, root, task_of(checked), source_name="s.objc")
                bind = ("ok", data.X.shape)
            except SpecError as err:
                d = err.diagnostics[0]
                bind = (d.code, d.span.line)
            except Exception as exc:  # noqa: BLE001 - counted, not hidden
                bind = ("crash " + type(exc).__name__, None)
            out, err_text = io.StringIO(), io.StringIO()
            with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err_text):
                code = main(["fit", str(root / "s.objc"), "--json", "-o", str(root / "out" / "m.json")])
            doc = json.loads(out.getvalue())
            written = (root / "out").exists() and any((root / "out").iterdir())
        if case.code is None:
            ok_bind = bind == ("ok", case.shape)
            ok_cli = code == 0 and doc.get("ok") and written
        else:
            ok_bind = bind[0] == case.code and bind[1] == case.line
            errs = [e for e in doc.get("errors", []) if e["code"] == case.code]
            ok_cli = (code == 1 and bool(errs) and errs[0]["line"] == case.line and not written
                      and "Traceback" not in err_text.getvalue())
        results.append({"id": case.id, "expected": case.code or "success", "bind": bool(ok_bind),
                        "cli": bool(ok_cli)})
    return {"cases": results, "by_outcome": Counter(r["expected"] for r in results)}


def _run_tests(files: list[str]) -> dict[str, str]:
    """pytest on `files`; each test's outcome by node id ('passed', 'failed', 'skipped', 'error')."""
    with tempfile.TemporaryDirectory() as tmp:
        xml = Path(tmp) / "r.xml"
        subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", f"--junitxml={xml}", *files],
                       cwd=ROOT, capture_output=True, text=True)
        tree = ET.parse(xml)
    outcomes = {}
    for tc in tree.iter("testcase"):
        path = tc.get("classname", "").replace(".", "/") + ".py"
        node = f"{path}::{tc.get('name')}"
        kind = "passed"
        for child in tc:
            if child.tag in ("failure", "error", "skipped"):
                kind = {"failure": "failed"}.get(child.tag, child.tag)
        outcomes[node] = kind
    return outcomes


def _fuzz(n_specs: int) -> dict | str:
    try:
        import test_fuzz
    except ImportError as exc:
        return f"tests/test_fuzz.py could not be imported ({exc}); no fuzz figures in this run"
    if not hasattr(test_fuzz, "fuzz_figures"):
        return "tests/test_fuzz.py has no fuzz_figures() yet; no fuzz figures in this run"
    return test_fuzz.fuzz_figures(n_specs, test_fuzz.SEED)


def _table(header: list[str], rows: list[list]) -> list[str]:
    out = ["| " + " | ".join(header) + " |", "| " + " | ".join("---" for _ in header) + " |"]
    out += ["| " + " | ".join(str(c) for c in r) + " |" for r in rows]
    return out


def render(fuzz: dict | str, n_specs: int, corpus: dict, tests: dict[str, str]) -> str:
    lines = ["# Reliability, measured", "",
             "Written by `python bench/reliability_figures.py` from one run of the fuzz campaign, the broken-table",
             "corpus and the fault tests; regenerate it rather than edit it. What each part promises: a spec or",
             "table never crashes objc with a traceback, an interrupted run never leaves half a model, and text",
             "from a spec or a table never runs as code.", ""]

    lines += ["## 1. Fuzzed specs", ""]
    if isinstance(fuzz, str):
        lines += [fuzz + ".", ""]
    else:
        lines += [f"{fuzz['specs']} specs from seed {__import__('test_fuzz').SEED}: {fuzz['generated']} from the "
                  f"grammar-aware generator, {fuzz['mutated']} byte-level mutations of the example specs "
                  "(tests/test_fuzz.py).", ""]
        lines += _table(["generated by", "specs"], [[k, v] for k, v in fuzz["generated_by_shape"].items()]) + [""]
        lines += _table(["mutation", "specs"], [[k, v] for k, v in fuzz["mutated_by_kind"].items()]) + [""]
        rows = []
        for stage, outcomes in fuzz["stages"].items():
            ok = outcomes.get("ok", 0)
            errs = sum(v for k, v in outcomes.items() if k.startswith("SpecError") or k == "NotSupported")
            crashes = sum(v for k, v in outcomes.items() if k.startswith("crash"))
            rows.append([stage, fuzz["specs_per_stage"][stage], ok, errs, crashes])
        lines += _table(["stage", "specs reaching it", "success", "objc's own error", "crash"], rows) + [""]
        lines += [f"Distinct failures left in this run (an exception other than objc's own, or a message whose "
                  f"line, column or caret is wrong): **{fuzz['failures']}**."]
        lines += [f"- `{s}`" for s in fuzz["failure_signatures"]]
        lines += [""]

    cases = corpus["cases"]
    bind_ok, cli_ok = sum(c["bind"] for c in cases), sum(c["cli"] for c in cases)
    lines += ["## 2. Broken and odd tables", "",
              f"{len(cases)} tables (tests/test_tables_corpus.py), each with its expected outcome, run through "
              "`objc.tables.bind_table` and through `objc fit --json -o` (exit 1, a located message, no "
              "traceback, nothing written; or success with the expected shape).", "",
              f"- as expected through bind_table: **{bind_ok} of {len(cases)}**",
              f"- as expected through the command line: **{cli_ok} of {len(cases)}**", ""]
    lines += _table(["expected outcome", "cases"], [[k, v] for k, v in sorted(corpus["by_outcome"].items())]) + [""]
    wrong = [c["id"] for c in cases if not (c["bind"] and c["cli"])]
    lines += [("Cases not as expected: " + ", ".join(wrong)) if wrong else "Every case came out as expected.", ""]

    lines += ["## 3. Faults injected", ""]
    for title, file in FAULT_FILES.items():
        mine = {k: v for k, v in tests.items() if k.startswith(file)}
        counts = Counter(mine.values())
        lines += [f"### {title} ({file})", "",
                  f"{len(mine)} tests: " + ", ".join(f"{v} {k}" for k, v in sorted(counts.items())) + ".", ""]
        lines += _table(["fault", "outcome"], [[k.split("::", 1)[1], v] for k, v in sorted(mine.items())]) + [""]
    lines += ["Skipped tests say why in their reason (e.g. a read-only folder cannot be tested as root; a "
              "simulated one runs instead).", "",
              "What may differ between two runs of the same spec, data and seed: no timing is written into a "
              "model (it is printed, and in `objc fit --json`); a model records where its spec and table were "
              "(`spec.path`, `spec.resolved_path`, `schema.training_table`) and its arrays file's name "
              "(`arrays.file`), and a generated module names its spec by the path it was given, so files "
              "are byte-identical when run from the same folder with the same paths, and trained elsewhere "
              "differ in those fields (and so in `document_sha256`) only.", "",
              "After SIGKILL (which no program can catch) a hidden staging file `.NAME.*.tmp` may remain beside "
              "the output; a file under the output's own name is always complete.", ""]

    lines += ["## 4. Defects found and fixed", ""]
    rows = []
    ids = {c["id"]: c for c in cases}
    for what, code, test in DEFECTS:
        if test.startswith("corpus:"):
            c = ids.get(test[7:])
            status = "passes" if c and c["bind"] and c["cli"] else "FAILS"
            where = f"corpus case `{test[7:]}`"
        else:
            status = {"passed": "passes"}.get(tests.get(test, "missing"), tests.get(test, "missing").upper())
            where = f"`{test}`"
        rows.append([what, code, where, status])
    lines += _table(["defect", "code now", "regression test", "in this run"], rows) + [""]
    if not isinstance(fuzz, str):
        lines += ["Crashes and misplaced messages the fuzz campaign found are listed with their regression tests "
                  "in tests/test_fuzz.py.", ""]
    return "\n".join(lines)


def main() -> int:
    ap = argparse.ArgumentParser(description="regenerate docs/reliability.md from a run")
    ap.add_argument("--stdout", action="store_true", help="print the file instead of writing it")
    ap.add_argument("--fuzz-specs", type=int, default=None, help="fuzz specs to run (default: the CI figure)")
    args = ap.parse_args()
    try:
        import test_fuzz
        n = args.fuzz_specs or test_fuzz.DEFAULT_SPECS
    except ImportError:
        n = args.fuzz_specs or 0
    fuzz = _fuzz(n)
    corpus = _run_corpus()
    tests = _run_tests(list(FAULT_FILES.values()))
    text = render(fuzz, n, corpus, tests)
    if args.stdout:
        sys.stdout.write(text)
    else:
        from objc.model_io import atomic_write_files
        atomic_write_files([(ROOT / "docs" / "reliability.md", text.encode("utf-8"))])
        print(f"wrote docs/reliability.md ({len(text.splitlines())} lines)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
