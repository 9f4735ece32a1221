"""The on-disk format of one model version, and its verification.

Layout (format version 3)::

    <store>/<model name>/<version>/manifest.json
    <store>/<model name>/<version>/arrays.npz
    <store>/<model name>/<version>/cv.npz        (when the version has a CV table)

The manifest stays small and of bounded size (the chosen point, the summary, the schema); the CV
table, which grows with basis settings × strengths × l1 ratios (800,000 rows is within the grid budget),
lives in ``cv.npz``, one numeric column per field, and is read only by the routes that show it
(``/cv`` pages through it). In the manifest, ``training.cv_table`` is then a reference::

    "cv_table": {"file": "cv.npz", "sha256": "<hex>", "bytes": 123, "members": {...}, "rows": 800000,
                 "keys": ["basis", "strength", "l1_ratio", "mean", "std", "split_values", ...],
                 "bases": [{"kind": "linear"}, {"kind": "polynomial", "degree": 2}, ...]}

with members ``basis`` (int32 index into ``bases``), ``split_values`` (rows × splits, when every row has a
per-split list) and one float64 column per other key (a JSON ``null`` is stored as NaN; strict JSON
has no NaN, so the mapping is exact both ways). Format version 1 manifests (the CV table inline, no
``cv.npz``) and format version 2 ones (``cv.npz``, older key names) are still read: ``read_manifest``
gives them today's key names (``upgrade``), so no reader past this module sees an old name.

``arrays.npz`` is an uncompressed ZIP of ``.npy`` members, one per array, written with
``allow_pickle=False`` and with fixed member timestamps, so equal arrays give equal bytes (and an equal
SHA-256). Only plain numeric dtypes are accepted (bool, signed and unsigned integers, floats, complex);
object, structured, string and time dtypes are refused at publish and at load. Loading uses
``numpy.load(..., allow_pickle=False)`` on bytes that were hashed first, so what is verified is what is
read.

``manifest.json`` is UTF-8 JSON (no NaN or Infinity tokens) of this shape::

    {
      "format": "tikhon-model",
      "format_version": 1,
      "name": "pump-7",
      "version": 3,
      "created_at": "2026-05-09T07:35:25.123456+00:00",
      "job_id": "9f0c..." | null,
      "libraries": {"python": "3.11.7", "numpy": "2.4.6", "scikit-learn": "1.9.1", "tikhon": "0.1.0"},
      "arrays": {
        "file": "arrays.npz",
        "sha256": "<hex of arrays.npz>",
        "bytes": 123456,
        "members": {"coefficients": {"dtype": "<f8", "shape": [1000]}, ...}
      },
      "training": { ... the engine's manifest body: spec, chosen point, the fitted ``model`` (basis,
                    coefficients' meaning, training ranges), CV table and summary, path, residual
                    quantiles, data fingerprint ... }
    }

The catalog row of the version keeps the SHA-256 of the manifest file itself; since the manifest pins
the SHA-256 of ``arrays.npz``, that one value fixes every byte of the version. Loading checks, in order:
the manifest's SHA-256 against the catalog, its format and format version, that its name and version
match the folder asked for, the declared dtypes, the SHA-256 and size of ``arrays.npz``, and that the
members of the ZIP are exactly the declared arrays with the declared dtypes and shapes. Any mismatch is
an ``IntegrityFailure`` that says which check failed and where.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import os
import platform
import re
import zipfile
from importlib import metadata as _metadata
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from service.errors import IntegrityFailure

FORMAT = "tikhon-model"
FORMAT_VERSION = 3
SUPPORTED_FORMAT_VERSIONS = (1, 2, 3)
MANIFEST_FILE = "manifest.json"
ARRAYS_FILE = "arrays.npz"
CV_FILE = "cv.npz"

ALLOWED_KINDS = frozenset("biufc")  # bool, int, uint, float, complex
ARRAY_NAME_RULE = r"^[A-Za-z0-9_][A-Za-z0-9_.:-]{0,127}$"
_ARRAY_NAME_RE = re.compile(ARRAY_NAME_RULE)
_ZIP_TIME = (1980, 1, 1, 0, 0, 0)  # earliest ZIP timestamp; fixed so the bytes are reproducible
_CHUNK = 1 << 20


# ----------------------------------------------------------------------------------------------------
# small helpers


def fsync_dir(path: Path) -> None:
    """Make a directory's entries (renames, new files) durable."""
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def sha256_bytes(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while chunk := f.read(_CHUNK):
            h.update(chunk)
    return h.hexdigest()


def library_versions() -> dict[str, str]:
    """Versions of the libraries that shape a model's numbers (read from package metadata, no imports)."""

    def dist(name: str) -> str:
        try:
            return _metadata.version(name)
        except _metadata.PackageNotFoundError:
            return "not installed"

    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": dist("scipy"),
        "scikit-learn": dist("scikit-learn"),
        "tikhon": dist("tikhon"),
    }


def _json_problem(obj: Any, path: str = "$") -> str | None:
    """Find the first value that strict JSON cannot hold; return a description naming its path."""
    if obj is None or isinstance(obj, (str, bool, int)):
        return None
    if isinstance(obj, float):
        return None if math.isfinite(obj) else f"{path} is {obj!r} (JSON has no NaN or Infinity; use null)"
    if isinstance(obj, Mapping):
        for k, v in obj.items():
            if not isinstance(k, str):
                return f"{path} has a non-string key {k!r}"
            if (p := _json_problem(v, f"{path}.{k}")) is not None:
                return p
        return None
    if isinstance(obj, (list, tuple)):
        for i, v in enumerate(obj):
            if (p := _json_problem(v, f"{path}[{i}]")) is not None:
                return p
        return None
    return f"{path} is a {type(obj).__module__}.{type(obj).__name__}, which is not plain JSON (convert it first)"


def dump_json(obj: Any, *, what: str) -> bytes:
    problem = _json_problem(obj)
    if problem is not None:
        raise IntegrityFailure(f"{what} cannot be stored as strict JSON: {problem}.")
    return json.dumps(obj, sort_keys=True, indent=1, ensure_ascii=False, allow_nan=False).encode("utf-8") + b"\n"


# ----------------------------------------------------------------------------------------------------
# arrays


def check_arrays(arrays: Mapping[str, Any]) -> dict[str, np.ndarray]:
    """Validate the arrays handed to ``publish``; return them as a plain dict (no copies)."""
    if not isinstance(arrays, Mapping):
        raise IntegrityFailure(f"arrays must be a mapping of name to numpy array, received {type(arrays).__name__}.")
    out: dict[str, np.ndarray] = {}
    for name, arr in arrays.items():
        if not isinstance(name, str) or not _ARRAY_NAME_RE.fullmatch(name):
            raise IntegrityFailure(f"array name {name!r} is not allowed; use names matching {ARRAY_NAME_RULE}.")
        if not isinstance(arr, np.ndarray):
            raise IntegrityFailure(
                f"array {name!r} is a {type(arr).__name__}, not a numpy array; pass numeric numpy arrays only."
            )
        _check_dtype(arr.dtype, f"array {name!r}", when="publish")
        out[name] = arr
    return out


def _check_dtype(dtype: np.dtype, what: str, *, when: str) -> None:
    if dtype.hasobject or dtype.kind not in ALLOWED_KINDS or dtype.fields is not None:
        action = "cannot be stored" if when == "publish" else "is refused"
        raise IntegrityFailure(
            f"{what} has dtype {dtype.str!r} and {action}: stored models hold plain numeric arrays only "
            f"(bool, int, uint, float, complex), never objects that would need pickle."
        )


def write_arrays(folder: Path, arrays: Mapping[str, np.ndarray], file: str = ARRAYS_FILE) -> dict[str, Any]:
    """Write ``arrays.npz`` (or ``file``) into ``folder``, fsync it, and return the manifest's section."""
    path = folder / file
    members: dict[str, Any] = {}
    with open(path, "xb") as raw:
        with zipfile.ZipFile(raw, "w", compression=zipfile.ZIP_STORED, allowZip64=True) as zf:
            for name in sorted(arrays):
                arr = np.asarray(arrays[name])
                info = zipfile.ZipInfo(name + ".npy", date_time=_ZIP_TIME)
                info.compress_type = zipfile.ZIP_STORED
                info.external_attr = 0o644 << 16
                with zf.open(info, "w", force_zip64=True) as member:
                    np.lib.format.write_array(member, arr, allow_pickle=False)
                members[name] = {"dtype": arr.dtype.str, "shape": list(arr.shape)}
        raw.flush()
        os.fsync(raw.fileno())
    return {"file": file, "sha256": sha256_file(path), "bytes": path.stat().st_size, "members": members}


# ----------------------------------------------------------------------------------------------------
# the CV table as columns


def split_cv_table(rows: Any) -> tuple[dict[str, np.ndarray], dict[str, Any]] | None:
    """The CV table (a list of row objects) as numeric columns plus their description, or None when a
    row does not fit the column form (it then stays inline in the manifest, as in format version 1)."""
    if not isinstance(rows, list) or not rows or not all(isinstance(r, dict) for r in rows):
        return None
    keys = list(rows[0])
    if any(list(r) != keys for r in rows) or "basis" not in keys:
        return None
    bases: dict[str, int] = {}
    basis_list: list[Any] = []
    index = np.empty(len(rows), dtype=np.int32)
    for i, r in enumerate(rows):
        k = json.dumps(r["basis"], sort_keys=True)
        if k not in bases:
            bases[k] = len(basis_list)
            basis_list.append(r["basis"])
        index[i] = bases[k]
    out: dict[str, np.ndarray] = {"basis": index}
    for key in keys:
        if key == "basis":
            continue
        values = [r[key] for r in rows]
        if key == "split_values" and all(isinstance(v, list) for v in values):
            width = len(values[0])
            if any(len(v) != width for v in values) or not all(_number(x) for v in values for x in v):
                return None
            out["split_values"] = np.array(values, dtype=np.float64).reshape(len(rows), width)
        elif all(v is None or _number(v) for v in values):
            out[key] = np.array([np.nan if v is None else float(v) for v in values], dtype=np.float64)
        else:
            return None
        if not _ARRAY_NAME_RE.fullmatch(key):
            return None
    return out, {"rows": len(rows), "keys": keys, "bases": basis_list}


def _number(v: Any) -> bool:
    return type(v) in (int, float) and math.isfinite(v)


def cv_rows(columns: Mapping[str, np.ndarray], meta: Mapping[str, Any], index: Any) -> list[dict[str, Any]]:
    """Rows ``index`` (a slice or integer array) of a CV table in column form, as row objects."""
    picked = {k: np.asarray(v[index]) for k, v in columns.items()}
    n = len(picked["basis"])
    lists = {k: (v.tolist() if k == "split_values" else [None if x != x else x for x in v.tolist()])
             for k, v in picked.items() if k != "basis"}
    bases = meta["bases"]
    basis = [bases[i] for i in picked["basis"].tolist()]
    out = []
    for i in range(n):
        row: dict[str, Any] = {}
        for key in meta["keys"]:
            if key == "basis":
                row[key] = dict(basis[i])
            elif key in lists:
                row[key] = lists[key][i]
            else:  # a key whose every value was null in a list form, e.g. loo's split_values
                row[key] = None
        out.append(row)
    return out


def build_manifest(
    *, name: str, version: int, created_at: str, job_id: str | None, arrays_info: dict[str, Any], body: Any
) -> dict[str, Any]:
    return {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "name": name,
        "version": version,
        "created_at": created_at,
        "job_id": job_id,
        "libraries": library_versions(),
        "arrays": arrays_info,
        "training": body,
    }


def write_manifest(folder: Path, manifest_bytes: bytes) -> None:
    path = folder / MANIFEST_FILE
    with open(path, "xb") as f:
        f.write(manifest_bytes)
        f.flush()
        os.fsync(f.fileno())


# ----------------------------------------------------------------------------------------------------
# reading and verification


def _fail(where: str, message: str) -> IntegrityFailure:
    return IntegrityFailure(f"{where}: {message}")


def read_manifest(folder: Path, *, expected_sha256: str, name: str, version: int) -> tuple[dict[str, Any], int]:
    """Read and verify ``manifest.json`` of one version; return (manifest, size in bytes)."""
    where = f"model {name!r} version {version} (folder {folder.parent.name}/{folder.name} of the store)"
    try:
        data = (folder / MANIFEST_FILE).read_bytes()
    except FileNotFoundError:
        raise _fail(where, f"{MANIFEST_FILE} is missing although the catalog lists this version; "
                           "restore the folder from a backup or delete the version") from None
    except OSError as exc:
        raise _fail(where, f"{MANIFEST_FILE} cannot be read ({exc.strerror})") from None
    actual = sha256_bytes(data)
    if actual != expected_sha256:
        raise _fail(where, f"{MANIFEST_FILE} was changed after publishing: its SHA-256 is {actual}, "
                           f"the catalog recorded {expected_sha256}; the version is not loaded")
    try:
        manifest = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise _fail(where, f"{MANIFEST_FILE} is not valid UTF-8 JSON ({exc})") from None
    if not isinstance(manifest, dict):
        raise _fail(where, f"{MANIFEST_FILE} must hold a JSON object, found {type(manifest).__name__}")
    if manifest.get("format") != FORMAT:
        raise _fail(where, f"{MANIFEST_FILE} has format {manifest.get('format')!r}, expected {FORMAT!r}")
    fv = manifest.get("format_version")
    if fv not in SUPPORTED_FORMAT_VERSIONS:
        raise _fail(where, f"{MANIFEST_FILE} has format_version {fv!r}; this Tikhon reads "
                           f"{', '.join(map(str, SUPPORTED_FORMAT_VERSIONS))} (upgrade Tikhon or re-publish the model)")
    if manifest.get("name") != name or manifest.get("version") != version:
        raise _fail(where, f"{MANIFEST_FILE} describes {manifest.get('name')!r} version "
                           f"{manifest.get('version')!r}, not the folder it sits in")
    arrays = manifest.get("arrays")
    if (not isinstance(arrays, dict) or arrays.get("file") != ARRAYS_FILE
            or not isinstance(arrays.get("members"), dict) or not isinstance(arrays.get("sha256"), str)):
        raise _fail(where, f"{MANIFEST_FILE} has no valid 'arrays' section (file, sha256, bytes, members)")
    for member, decl in arrays["members"].items():
        try:
            dtype = np.dtype(decl["dtype"])
            shape = tuple(int(s) for s in decl["shape"])
        except Exception:  # any malformed declaration is one clear failure
            raise _fail(where, f"array {member!r} has a malformed declaration {decl!r}") from None
        del shape
        if dtype.hasobject or dtype.kind not in ALLOWED_KINDS or dtype.fields is not None:
            raise _fail(where, f"array {member!r} is declared with dtype {decl['dtype']!r}, which would need "
                               "pickle or is not plain numeric; stored models never use pickle")
    return upgrade(manifest), len(data)


# Names a manifest of format version 1 or 2 used, and today's: the engine's body was "model" (so the
# fitted model sat at manifest["model"]["model"]), the fitted model's count of CV splits "folds", and a CV
# table row's metric per split "folds" (also the member of cv.npz, which keeps its stored name).
_OLD_BODY, _OLD_SPLITS, _OLD_SPLIT_VALUES = "model", "folds", "folds"


def upgrade(manifest: dict[str, Any]) -> dict[str, Any]:
    """``manifest`` (read and checked) with today's key names: a format 1 or 2 manifest is renamed in
    place (its bytes and checksums are untouched), a format 3 one is returned as it is."""
    if manifest.get("format_version") not in (1, 2) or "training" in manifest:
        return manifest
    if _OLD_BODY in manifest:
        manifest["training"] = manifest.pop(_OLD_BODY)
    body = manifest.get("training")
    if not isinstance(body, dict):
        return manifest
    model = body.get("model")
    if isinstance(model, dict) and isinstance(model.get("cv"), dict):
        model["cv"] = _renamed(model["cv"], _OLD_SPLITS, "splits")
    table = body.get("cv_table")
    if isinstance(table, list):
        body["cv_table"] = [_renamed(r, _OLD_SPLIT_VALUES, "split_values") if isinstance(r, dict) else r for r in table]
    elif isinstance(table, dict) and isinstance(table.get("keys"), list):
        table["keys"] = ["split_values" if k == _OLD_SPLIT_VALUES else k for k in table["keys"]]
    return manifest


def upgrade_cv_columns(columns: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The columns of a ``cv.npz`` with today's names (a format 2 file holds the metric per split as
    member ``folds``; ``upgrade`` renamed it in the manifest's list of keys)."""
    if _OLD_SPLIT_VALUES in columns and "split_values" not in columns:
        columns["split_values"] = columns.pop(_OLD_SPLIT_VALUES)
    return columns


def _renamed(d: dict[str, Any], old: str, new: str) -> dict[str, Any]:
    """``d`` with key ``old`` called ``new``, in the same place among the keys."""
    if old not in d or new in d:
        return d
    return {(new if k == old else k): v for k, v in d.items()}


def read_arrays(folder: Path, manifest: dict[str, Any], *, name: str, version: int,
                info: dict[str, Any] | None = None) -> tuple[dict[str, np.ndarray], int]:
    """Read ``arrays.npz`` (or the file ``info`` describes, e.g. the manifest's ``cv_table`` reference)
    after checking it against the manifest; return (arrays, total array bytes)."""
    where = f"model {name!r} version {version} (folder {folder.parent.name}/{folder.name} of the store)"
    info = manifest["arrays"] if info is None else info
    fname = info.get("file")
    if fname not in (ARRAYS_FILE, CV_FILE) or not isinstance(info.get("sha256"), str) \
            or not isinstance(info.get("members"), dict):
        raise _fail(where, f"the manifest's reference to {fname!r} is not valid (file, sha256, members)")
    for member, decl in info["members"].items():
        try:
            dtype = np.dtype(decl["dtype"])
        except Exception:
            raise _fail(where, f"array {member!r} has a malformed declaration {decl!r}") from None
        if dtype.hasobject or dtype.kind not in ALLOWED_KINDS or dtype.fields is not None:
            raise _fail(where, f"array {member!r} is declared with dtype {decl['dtype']!r}, which would need "
                               "pickle or is not plain numeric; stored models never use pickle")
    try:
        data = (folder / fname).read_bytes()
    except FileNotFoundError:
        raise _fail(where, f"{fname} is missing; restore the folder from a backup or delete the version") from None
    except OSError as exc:
        raise _fail(where, f"{fname} cannot be read ({exc.strerror})") from None
    actual = sha256_bytes(data)
    if actual != info["sha256"]:
        raise _fail(where, f"{fname} is damaged or was changed: its SHA-256 is {actual}, "
                           f"the manifest recorded {info['sha256']}; the version is not loaded")
    declared = info["members"]
    out: dict[str, np.ndarray] = {}
    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as npz:
            files = set(npz.files)
            if files != set(declared):
                raise _fail(where, f"{fname} holds arrays {sorted(files)}, the manifest declares "
                                   f"{sorted(declared)}")
            for member in sorted(files):
                try:
                    arr = npz[member]
                except ValueError as exc:
                    if "pickle" in str(exc):
                        raise _fail(where, f"array {member!r} in {fname} needs pickle to load "
                                           "(object dtype); stored models never use pickle") from None
                    raise _fail(where, f"array {member!r} in {fname} cannot be read ({exc})") from None
                decl = declared[member]
                if arr.dtype.str != decl["dtype"] or list(arr.shape) != list(decl["shape"]):
                    raise _fail(where, f"array {member!r} has dtype {arr.dtype.str} and shape {list(arr.shape)}, "
                                       f"the manifest declares {decl['dtype']} and {decl['shape']}")
                _check_dtype(arr.dtype, f"{where}: array {member!r}", when="load")
                out[member] = arr
    except IntegrityFailure:
        raise
    except Exception as exc:  # a damaged ZIP raises several types (BadZipFile, OSError, ValueError...)
        raise _fail(where, f"{fname} cannot be read as an uncompressed .npz ({type(exc).__name__}: {exc})") from None
    return out, sum(a.nbytes for a in out.values())
