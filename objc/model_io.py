"""Saved models: plain data only (a JSON document plus an .npz of arrays; never pickle), written
atomically so a failed run leaves nothing half-written."""

from __future__ import annotations

import hashlib
import io
import json
import os
import tempfile
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


def _atomic_write(path: Path, data: bytes) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        # mkstemp creates the file 0600; the output is an ordinary file, so it gets the mode the
        # user's umask gives a new file, as open() would
        os.fchmod(fd, 0o666 & ~_current_umask())
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def save_model(out: Path, document: dict, params: dict[str, np.ndarray | float]) -> Path:
    """Write MODEL.json and MODEL.npz; the JSON records the npz's sha256 so a mismatched pair is caught."""
    json_path, npz_path = model_paths(out)
    buf = io.BytesIO()
    np.savez(buf, **{name: np.asarray(v, dtype=np.float64) for name, v in params.items()})
    arrays = buf.getvalue()
    doc = dict(document)
    doc["format"] = MODEL_FORMAT
    doc["arrays"] = {"file": npz_path.name, "sha256": hashlib.sha256(arrays).hexdigest(),
                     "names": sorted(params)}
    text = json.dumps(doc, indent=2, sort_keys=False, default=jsonable).encode("utf-8") + b"\n"
    _atomic_write(npz_path, arrays)
    _atomic_write(json_path, text)
    return json_path


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
    npz_path = json_path.with_name(doc["arrays"]["file"])
    try:
        raw = npz_path.read_bytes()
    except OSError:
        raise _model_error("M504", f"the model's arrays file is missing: {npz_path}", json_path,
                           "keep the .npz next to the .json") from None
    if hashlib.sha256(raw).hexdigest() != doc["arrays"]["sha256"]:
        raise _model_error("M505", f"{npz_path} does not belong to {json_path} (checksum differs)", json_path,
                           "refit, or restore the matching pair of files")
    with np.load(io.BytesIO(raw), allow_pickle=False) as z:
        params = {}
        for name in doc["arrays"]["names"]:
            a = np.array(z[name], dtype=np.float64)
            params[name] = float(a) if a.ndim == 0 else a
    return SavedModel(doc, params, json_path)
