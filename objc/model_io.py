"""Saved models: plain data only (a JSON document plus an .npz of arrays; never pickle), written
atomically so a failed run leaves nothing half-written."""

from __future__ import annotations

import contextlib
import errno
import hashlib
import io
import json
import os
import signal
import tempfile
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np

from objc.diagnostics import Diagnostic, SpecError
from objc.source_text import NO_SPAN

MODEL_FORMAT = "objc-model/1"


@dataclass(frozen=True)
class SavedModel:
    """A trained model as read back: the JSON document and the parameter arrays."""

    document: dict
    params: dict[str, np.ndarray | float]
    path: Path

    @property
    def input_names(self) -> tuple[str, ...]:
        return tuple(self.document["schema"]["inputs"])


def model_paths(out: Path) -> tuple[Path, Path]:
    """`out` names the JSON file; the arrays go beside it with the suffix .npz."""
    out = Path(out)
    if out.suffix != ".json":
        out = out.with_name(out.name + ".json")
    return out, out.with_suffix(".npz")


def _current_umask() -> int:
    mask = os.umask(0o022)  # the only portable way to read it is to set it and put it back
    os.umask(mask)
    return mask


def _write_failed(path: Path, err: OSError) -> SpecError:
    """A write that the system refused (read-only folder, a folder in the way, a full disk) as one
    clear message, never a traceback."""
    reason = err.strerror or type(err).__name__
    if isinstance(err, IsADirectoryError) or path.is_dir():
        reason, hint = "it is a folder", "give a file name, e.g. OUT/model.json"
    elif getattr(err, "errno", None) == errno.ENOSPC:
        hint = "free some space on that disk, or write elsewhere"
    elif isinstance(err, PermissionError):
        hint = "choose a folder you may write to"
    else:
        hint = "check the output path"
    return SpecError((Diagnostic("M507", f"cannot write {path}: {reason}; nothing was written", NO_SPAN,
                                 hint=hint, source_name=str(path)),))


def _staged(path: Path, data) -> str:
    """`data` (bytes, or a function that writes to a binary file: output too large to hold at once) in a
    hidden temporary file beside `path`, flushed to disk; its name."""
    if path.is_dir():
        raise IsADirectoryError(errno.EISDIR, "Is a directory", str(path))
    if path.exists() and not path.is_file():
        # a device or a pipe (/dev/full, a FIFO): renaming over it would replace the node itself
        raise OSError(errno.EINVAL, "not a regular file (a device or a pipe)", str(path))
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        # mkstemp creates the file 0600; the output is an ordinary file, so it gets the mode the
        # user's umask gives a new file, as open() would
        os.fchmod(fd, 0o666 & ~_current_umask())
        with os.fdopen(fd, "wb") as f:
            if callable(data):
                data(f)
            else:
                f.write(data)
            f.flush()
            os.fsync(f.fileno())
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return tmp


@contextlib.contextmanager
def _signals_held():
    """Hold Ctrl-C and SIGTERM back for the few renames that put a set of files in place, so an
    interruption lands before them (nothing new) or after them (all new), never between.

    The Python-level handlers are swapped, not the thread's signal mask: a process-directed signal
    may be taken by any thread (BLAS starts some), but Python runs every handler in the main thread."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    pending: list[int] = []
    held = (signal.SIGINT, signal.SIGTERM)
    previous = {s: signal.signal(s, lambda signum, frame: pending.append(signum)) for s in held}
    try:
        yield
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)
        if pending:
            signal.raise_signal(pending[0])  # now delivered to the handler that was in force


def atomic_write_files(items: list[tuple[Path, Any]]) -> None:
    """Write every file or none: each is staged in full first, then all are renamed into place in
    order, so an interruption (Ctrl-C, a full disk) before the renames leaves nothing new. A SIGKILL
    cannot be caught: it may leave a hidden `.NAME.*.tmp` file, never a file under the output name."""
    staged: list[tuple[str, Path]] = []
    current = Path(items[0][0]) if items else Path()
    try:
        for path, data in items:
            current = Path(path)
            staged.append((_staged(current, data), current))
        with _signals_held():
            for tmp, path in staged:
                current = path
                os.replace(tmp, path)
    except OSError as err:
        raise _write_failed(current, err) from None
    finally:
        for tmp, _ in staged:
            if os.path.exists(tmp):
                os.unlink(tmp)


def _atomic_write(path: Path, data: bytes) -> None:
    atomic_write_files([(Path(path), data)])


def save_model(out: Path, document: dict, params: dict[str, np.ndarray | float]) -> Path:
    """Write MODEL.json and MODEL.npz; the JSON records the npz's sha256 so a mismatched pair is caught.

    Both are staged before either is renamed, the JSON last: a reader finds the JSON only once its
    arrays are in place."""
    json_path, npz_path = model_paths(out)
    buf = io.BytesIO()
    np.savez(buf, **{name: np.asarray(v, dtype=np.float64) for name, v in params.items()})
    arrays = buf.getvalue()
    doc = dict(document)
    doc["format"] = MODEL_FORMAT
    doc["arrays"] = {"file": npz_path.name, "sha256": hashlib.sha256(arrays).hexdigest(),
                     "names": sorted(params)}
    doc = plain_json(doc)
    doc["document_sha256"] = document_digest(doc)
    text = dumps_strict(doc).encode("utf-8") + b"\n"
    atomic_write_files([(npz_path, arrays), (json_path, text)])
    return json_path


def plain_json(v):
    """`v` as plain JSON values: NumPy scalars and arrays as numbers and lists, paths as text, and a
    non-finite number (an infinite gap: no certificate formed) as null, since strict JSON has no
    Infinity or NaN and other programs' parsers refuse them."""
    if isinstance(v, dict):
        return {str(k): plain_json(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [plain_json(x) for x in v]
    if isinstance(v, (np.ndarray, np.generic, Path)):
        return plain_json(jsonable(v))
    if isinstance(v, float) and not np.isfinite(v):
        return None
    return v


def dumps_strict(doc, indent: int | None = 2) -> str:
    """One strict JSON document (no NaN or Infinity)."""
    return json.dumps(plain_json(doc), indent=indent, allow_nan=False)


def document_digest(doc: dict) -> str:
    """sha256 of the whole model document except this digest itself, in a canonical form, so an edit
    anywhere (a label map, a standardization mean) is caught on load."""
    body = {k: v for k, v in doc.items() if k != "document_sha256"}
    canonical = json.dumps(plain_json(body), sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()


def jsonable(v):
    """NumPy scalars and arrays and paths as plain JSON values (json.dumps's `default`)."""
    if isinstance(v, np.generic):
        return v.item()
    if isinstance(v, np.ndarray):
        return v.tolist()
    if isinstance(v, Path):
        return str(v)
    raise TypeError(f"not JSON-serializable: {type(v).__name__}")


def _model_error(code: str, message: str, path: Path, hint: str = "") -> SpecError:
    return SpecError((Diagnostic(code, message, NO_SPAN, hint=hint, source_name=str(path)),))


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _kind(*kinds: type) -> Callable[[object, dict], bool]:
    def test(v, doc: dict) -> bool:
        # Python's bool is an int, but JSON's true/false is not a number: keep them apart
        return isinstance(v, kinds) and not (isinstance(v, bool) and bool not in kinds)
    return test


def _list_of(*kinds: type) -> Callable[[object, dict], bool]:
    item = _kind(*kinds)
    return lambda v, doc: isinstance(v, list) and all(item(x, doc) for x in v)


def _numbers_per_input(v, doc: dict) -> bool:
    return isinstance(v, list) and len(v) == len(doc["schema"]["inputs"]) and all(_is_number(x) for x in v)


def _task(v, doc: dict) -> bool:
    from typing import get_args

    from objc.tables import Task  # the one list of tasks (imported late: it brings pandas)
    return v in get_args(Task)


def _classes(v, doc: dict) -> bool:
    return isinstance(v, list) and len(v) >= 2 and all(isinstance(c, str) or _is_number(c) for c in v)


def _matrix(v, doc: dict) -> bool:
    """A list of rows of numbers, all of one length (np.asarray of ragged rows would fail)."""
    return (isinstance(v, list) and all(isinstance(r, list) and all(_is_number(x) for x in r) for r in v)
            and len({len(r) for r in v}) <= 1)


def _multiclass(doc: dict) -> bool:
    return doc.get("task") == "multiclass"


def _label_pair(v, doc: dict) -> bool:
    return (isinstance(v, list) and len(v) == 2 and isinstance(v[0], (str, int, float))
            and _is_number(v[1]) and v[1] in (1, -1))


@dataclass(frozen=True)
class DocumentKey:
    """One key a loader reads from a model document.

    `path` is its JSON path: `a.b` a key of an object, `[]` every item of a list, `{}` every entry
    of an object whatever its name (a tunable's value). `expected` says what it must hold, in the
    message. `optional`: read with a default, so a document may lack it; `nullable`: null is a value
    the readers handle (and nothing below it is read then); `when`: the key is read only for documents
    this holds for (a task's own keys), and may be absent from the others."""

    path: str
    expected: str
    test: Callable[[object, dict], bool]
    optional: bool = False
    nullable: bool = False
    when: Callable[[dict], bool] | None = None


_OBJECT, _TEXT, _NUMBER = _kind(dict), _kind(str), _kind(int, float)

# Every key read by load_model, by training (load_trained, checked_from_model, bind_for_model,
# spec_dir_of, predicted_labels, TrainedModel) and by eval, predict and `plot convergence` in cli.py.
# A reader of a new key adds it here; tests/test_model_io.py records the keys those readers touch and
# fails on one missing from this list. Parents come before their children: a child is looked at only
# once its parent is sound, so a test may read its parent's siblings (means beside inputs).
DOCUMENT_KEYS: tuple[DocumentKey, ...] = (
    DocumentKey("format", f"the text {MODEL_FORMAT!r}", lambda v, doc: v == MODEL_FORMAT),
    DocumentKey("document_sha256", "the document's checksum (64 hexadecimal digits)",
                lambda v, doc: isinstance(v, str) and len(v) == 64),
    DocumentKey("spec", "an object (the spec the model was trained from)", _OBJECT),
    DocumentKey("spec.text", "the spec's text", _TEXT),
    DocumentKey("spec.path", "the spec's path as given to `objc fit`", _TEXT),
    DocumentKey("spec.resolved_path", "the spec's absolute path", _TEXT, optional=True),
    DocumentKey("task", "the task the model was trained for (margin, residual or multiclass)", _task),
    DocumentKey("verdict", "the checker's verdict (text)", _TEXT),
    DocumentKey("schema", "an object (the inputs and how rows are bound)", _OBJECT),
    DocumentKey("schema.inputs", "a list of input names", _list_of(str)),
    DocumentKey("schema.standardization", "an object with the means and scales, or null", _OBJECT,
                nullable=True),
    DocumentKey("schema.standardization.means", "a list of one number per input", _numbers_per_input),
    DocumentKey("schema.standardization.scales", "a list of one number per input", _numbers_per_input),
    DocumentKey("schema.label_map", "a list of [table value, +1 or -1] pairs, or null", _kind(list),
                nullable=True),
    DocumentKey("schema.label_map[]", "a [table value, +1 or -1] pair", _label_pair),
    DocumentKey("schema.classes", "a list of the class labels (text or numbers), at least two", _classes,
                when=_multiclass),
    DocumentKey("schema.fourier_draws", "an object of each `fourier` map's draws, or null", _OBJECT,
                optional=True, nullable=True),
    DocumentKey("schema.fourier_draws{}", "an object {W, b} (a `fourier` map's draws)", _OBJECT),
    DocumentKey("schema.fourier_draws{}.W", "a list of rows of numbers, all of one length", _matrix),
    DocumentKey("schema.fourier_draws{}.b", "a list of numbers", _list_of(int, float)),
    DocumentKey("schema.training_table", "the training table's name", _TEXT),
    DocumentKey("tunables", "an object of tunable values", _OBJECT, optional=True, nullable=True),
    DocumentKey("tunables{}", "a number (the tunable's value)", _NUMBER),
    DocumentKey("fit", "an object (the training report)", _OBJECT),
    DocumentKey("fit.method", "the solver's name (text)", _TEXT),
    DocumentKey("fit.history", "a list of convergence records", _kind(list), optional=True, nullable=True),
    DocumentKey("fit.history[]", "a record {passes, objective, gap}", _OBJECT),
    DocumentKey("fit.history[].passes", "a whole number of passes", _kind(int)),
    DocumentKey("fit.history[].objective", "a number or null", _NUMBER, nullable=True),
    DocumentKey("fit.history[].gap", "a number or null", _NUMBER, optional=True, nullable=True),
    DocumentKey("arrays", "an object (the arrays file's name, checksum and array names)", _OBJECT),
    DocumentKey("arrays.file", "the arrays file's name", _TEXT),
    DocumentKey("arrays.sha256", "the arrays file's checksum", _TEXT),
    DocumentKey("arrays.names", "a list of array names", _list_of(str)),
)


def key_steps(path: str) -> list[str]:
    """A DocumentKey path as steps: names, `[]` and `{}`."""
    return path.replace("[]", ".[]").replace("{}", ".{}").split(".")


_ABSENT = object()


def _places(doc: dict, key: DocumentKey) -> list[tuple[str, object]]:
    """(concrete JSON path, value or _ABSENT) of every place `key.path` names, e.g.
    ('fit.history[3].passes', 7); none below a parent that is null or absent (its children are
    not read then; a parent that must be there has been reported already)."""
    places: list[tuple[str, object]] = [("", doc)]
    for step in key_steps(key.path):
        nxt: list[tuple[str, object]] = []
        for where, node in places:
            if node is None or node is _ABSENT:
                continue
            if step == "[]":
                nxt += [(f"{where}[{k}]", item) for k, item in enumerate(node)]
            elif step == "{}":
                nxt += [(f"{where}.{name}", item) for name, item in node.items()]
            else:
                nxt.append((f"{where}.{step}" if where else step, node.get(step, _ABSENT)))
        places = nxt
    return places


def _kind_of(v) -> str:
    return {dict: "an object", list: "a list", str: "text", bool: "true/false", type(None): "null"}.get(
        type(v), "a number" if _is_number(v) else type(v).__name__)


def _shown(v) -> str:
    text = json.dumps(v, default=str)
    return text if len(text) <= 40 else text[:37] + "..."


def validate_document(doc: object, json_path: Path) -> None:
    """Refuse (M503) a model document that lacks a key the loaders read or holds the wrong kind of
    value there, naming the file, the key's JSON path, what it must hold and what to do. Run before
    anything reads the document, so no loader meets a KeyError or a TypeError."""
    hint = "refit with `objc fit -o`, or restore the file as `objc fit` wrote it"
    if not isinstance(doc, dict):
        raise _model_error("M503", f"{json_path} is not an objc model: the document is {_kind_of(doc)}, "
                           "not an object", json_path, hint)
    for key in DOCUMENT_KEYS:
        for where, value in _places(doc, key):
            if value is _ABSENT:
                if key.optional or (key.when is not None and not key.when(doc)):
                    continue
                raise _model_error("M503", f"{json_path} is not a complete objc model: it has no '{where}' "
                                   f"(expected {key.expected})", json_path, hint)
            if value is None and key.nullable:
                continue
            if not key.test(value, doc):
                raise _model_error("M503", f"{json_path}: '{where}' holds {_kind_of(value)} ({_shown(value)}), "
                                   f"expected {key.expected}", json_path, hint)


def check_arrays(saved: SavedModel, sizes: dict[str, int]) -> None:
    """Refuse (M505) a model whose arrays lack a parameter its spec learns, or hold one at another
    size than the spec gives it with the model's inputs: `sizes` maps each learned name to its size."""
    for name, size in sizes.items():
        got = saved.params.get(name)
        if got is None:
            raise _model_error("M505", f"{saved.path}: the spec learns '{name}' but the model's arrays "
                               f"({', '.join(sorted(saved.params)) or 'none'}) hold no '{name}'", saved.path,
                               "refit, or restore the matching pair of files")
        if np.size(got) != size:
            raise _model_error("M505", f"{saved.path}: the array '{name}' holds {np.size(got)} number(s); the spec "
                               f"learns {size} for the model's {len(saved.input_names)} input(s)", saved.path,
                               "refit, or restore the matching pair of files")


def load_model(path: Path) -> SavedModel:
    json_path, _ = model_paths(Path(path))
    if not json_path.exists():
        raise _model_error("M501", f"model file not found: {json_path}", json_path,
                           "give the .json file that `objc fit -o` wrote")
    try:
        doc = json.loads(json_path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as err:
        raise _model_error("M502", f"cannot read model {json_path}: {err}", json_path) from None
    if not isinstance(doc, dict) or doc.get("format") != MODEL_FORMAT:
        raise _model_error("M503", f"{json_path} is not an objc model (its 'format' is not {MODEL_FORMAT!r})",
                           json_path, "give the .json file that `objc fit -o` wrote, or refit")
    if "document_sha256" not in doc:
        raise _model_error("M506", f"{json_path} has no document checksum 'document_sha256' (written by an "
                           "earlier objc, or edited)", json_path,
                           "refit with `objc fit -o` to get a model whose edits are caught")
    validate_document(doc, json_path)
    if doc["document_sha256"] != document_digest(doc):
        raise _model_error("M506", f"{json_path} was changed after training (its checksum differs)", json_path,
                           "an edited model would predict with settings it was not trained with: refit with "
                           "`objc fit -o`, or restore the file as written")
    # the arrays file beside the JSON by the same name first, so renaming the pair keeps working; the
    # name recorded at training time second (a JSON renamed alone)
    candidates = [model_paths(json_path)[1], json_path.with_name(Path(doc["arrays"]["file"]).name)]
    npz_path = next((c for c in candidates if c.exists()), candidates[0])
    try:
        raw = npz_path.read_bytes()
    except OSError:
        raise _model_error("M504", f"the model's arrays file is missing: {npz_path}", json_path,
                           "keep the .npz next to the .json, with the same name") from None
    if hashlib.sha256(raw).hexdigest() != doc["arrays"]["sha256"]:
        raise _model_error("M505", f"{npz_path} does not belong to {json_path} (checksum differs)", json_path,
                           "refit, or restore the matching pair of files")
    return SavedModel(doc, _read_arrays(raw, doc["arrays"]["names"], npz_path, json_path), json_path)


def _read_arrays(raw: bytes, names: list[str], npz_path: Path, json_path: Path) -> dict[str, np.ndarray | float]:
    """The named arrays of an .npz whose checksum matched: one the document lists but the file lacks,
    or a file that is no .npz of numbers (possible only if both were rewritten), is refused."""
    import zipfile
    params: dict[str, np.ndarray | float] = {}
    try:
        with np.load(io.BytesIO(raw), allow_pickle=False) as z:
            lacking = [name for name in names if name not in z.files]
            if lacking:
                raise _model_error("M505", f"{npz_path} has no array {lacking[0]!r}, which {json_path} lists "
                                   "under 'arrays.names'", json_path, "refit, or restore the matching pair of files")
            for name in names:
                a = np.array(z[name], dtype=np.float64)
                params[name] = float(a) if a.ndim == 0 else a
    except (ValueError, TypeError, AttributeError, OSError, EOFError, zipfile.BadZipFile) as err:
        raise _model_error("M505", f"{npz_path} is not an arrays file of numbers ({type(err).__name__}: {err})",
                           json_path, "refit, or restore the matching pair of files") from None
    return params
