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


def _staged(path: Path, data: bytes) -> str:
    """`data` in a hidden temporary file beside `path`, flushed to disk; its name."""
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


def atomic_write_files(items: list[tuple[Path, bytes]]) -> None:
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


# what load_model needs of a document: key path -> the JSON types it may hold
_REQUIRED = {
    ("spec",): dict, ("spec", "text"): str, ("spec", "path"): str, ("task",): str, ("verdict",): str,
    ("schema",): dict, ("schema", "inputs"): list, ("schema", "standardization"): (dict, type(None)),
    ("schema", "label_map"): (list, type(None)), ("fit",): dict, ("arrays",): dict, ("arrays", "file"): str,
    ("arrays", "sha256"): str, ("arrays", "names"): list,
}


def _check_shape(doc: dict, json_path: Path) -> None:
    for keys, kinds in _REQUIRED.items():
        node = doc
        for k in keys:
            if not isinstance(node, dict) or k not in node:
                raise _model_error("M503", f"{json_path} is not a complete objc model: it has no "
                                   f"'{'.'.join(keys)}'", json_path, "refit with `objc fit -o`")
            node = node[k]
        if not isinstance(node, kinds):
            raise _model_error("M503", f"{json_path}: '{'.'.join(keys)}' has the wrong type "
                               f"({type(node).__name__})", json_path, "refit with `objc fit -o`")


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
        raise _model_error("M503", f"{json_path} is not an objc model (format {MODEL_FORMAT} expected)", json_path)
    _check_shape(doc, json_path)
    if "document_sha256" not in doc:
        raise _model_error("M506", f"{json_path} has no document checksum (written by an earlier objc, or "
                           "edited)", json_path, "refit with `objc fit -o` to get a model whose edits are caught")
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
    with np.load(io.BytesIO(raw), allow_pickle=False) as z:
        params = {}
        for name in doc["arrays"]["names"]:
            a = np.array(z[name], dtype=np.float64)
            params[name] = float(a) if a.ndim == 0 else a
    return SavedModel(doc, params, json_path)
