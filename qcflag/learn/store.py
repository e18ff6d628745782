"""Model files that hold parameters and metadata only, never code.

A qcflag model file (suffix ``.qcm`` by convention) is a zip archive with

``model.json``
    Format name and version, the flag scheme, rule set and feature-set version, the model
    card, and per variable the estimator class name, its constructor parameters, its feature
    names and the list of its arrays.
``arrays/<variable>/<name>.npy``
    Numeric arrays in NumPy's ``.npy`` format (booleans, integers, floats, fixed-width
    strings; never object arrays).
``integrity.json``
    SHA-256 of every other member and a digest over them all.

Loading never unpickles and never imports anything named in the file: the JSON is parsed
with :func:`json.loads`, every key and type is checked against a fixed schema, arrays are
read with ``numpy.load(allow_pickle=False)``, and estimators are rebuilt only from the
classes in :data:`qcflag.learn.estimators.ESTIMATORS`. A file that is not such an archive
(for instance a pickle), has unexpected members, keys, types or dtypes, fails its integrity
hash, or comes from a newer format version is refused with :class:`ModelFileError`.

The hash detects corruption and edits by anyone who does not recompute it; it is not a
signature. Safety against a malicious file comes from the loader never executing anything.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import re
import zipfile
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from qcflag.exceptions import ModelFileError
from qcflag.io.atomic import atomic_output

if TYPE_CHECKING:
    from numpy.typing import NDArray

    from qcflag.learn.model import QCModel

__all__ = ["FORMAT_NAME", "FORMAT_VERSION", "load_model", "save_model"]

FORMAT_NAME = "qcflag-model"
FORMAT_VERSION = 1
"""Version of the model-file layout; files with a higher version are refused."""

_MODEL_JSON = "model.json"
_INTEGRITY_JSON = "integrity.json"
_ARRAY_RE = re.compile(r"^arrays/([a-z][a-z_]{0,31})/([A-Za-z0-9_]{1,64})\.npy$")
_MAX_MEMBER = 2 << 30  # 2 GiB uncompressed per member
_MAX_TOTAL = 8 << 30
_MAX_JSON = 64 << 20
_ALLOWED_KINDS = set("biufU")
_TOP_KEYS = {"format", "format_version", "qcflag_version", "feature_set_version", "scheme",
             "rules", "card", "variables"}
_VAR_KEYS = {"estimator", "feature_names", "state", "arrays"}
_STATE_KEYS = {"params", "fitted", "fitted_n_features", "ensembles"}
_SCALAR = (type(None), bool, int, float, str)


def _digest(members: dict[str, bytes]) -> tuple[dict[str, str], str]:
    per = {name: hashlib.sha256(data).hexdigest() for name, data in sorted(members.items())}
    h = hashlib.sha256()
    for name, hx in per.items():
        h.update(name.encode() + b"\0" + hx.encode() + b"\n")
    return per, h.hexdigest()


def _npy_bytes(arr: NDArray[Any]) -> bytes:
    if arr.dtype.kind not in _ALLOWED_KINDS:
        raise ModelFileError(f"cannot store array of dtype {arr.dtype} in a model file")
    buf = io.BytesIO()
    np.save(buf, np.ascontiguousarray(arr), allow_pickle=False)
    return buf.getvalue()


def save_model(model: QCModel, path: str | os.PathLike[str], *, overwrite: bool = False) -> Path:
    """Write `model` to `path` atomically (parameters and metadata only).

    Parameters
    ----------
    model : QCModel
        A fitted model.
    path : path-like
        Output file (``.qcm`` suggested).
    overwrite : bool, default=False
        Replace an existing file.

    Returns
    -------
    pathlib.Path

    Raises
    ------
    OutputExistsError
        If `path` exists and `overwrite` is false.
    """
    meta, arrays = model._export()
    meta = {"format": FORMAT_NAME, "format_version": FORMAT_VERSION, **meta}
    members: dict[str, bytes] = {}
    for var, spec in meta["variables"].items():
        spec["arrays"] = sorted(arrays[var])
        for name, arr in arrays[var].items():
            members[f"arrays/{var}/{name}.npy"] = _npy_bytes(np.asarray(arr))
    members[_MODEL_JSON] = json.dumps(meta, indent=1, sort_keys=True, allow_nan=False).encode()
    per, digest = _digest(members)
    integrity = {"algorithm": "sha256", "members": per, "digest": digest}
    members[_INTEGRITY_JSON] = json.dumps(integrity, indent=1, sort_keys=True).encode()
    target = Path(path)
    with atomic_output(target, overwrite=overwrite) as tmp, zipfile.ZipFile(
        tmp, "w", compression=zipfile.ZIP_DEFLATED
    ) as zf:
        for name in sorted(members):
            zf.writestr(name, members[name])
    return target


# ------------------------------------------------------------------------------- loading
def _refuse(path: Path, problem: str, fix: str = "retrain the model or obtain an intact copy"
            ) -> ModelFileError:
    return ModelFileError(f"{path}: {problem}; {fix}")


def _read_members(path: Path) -> dict[str, bytes]:
    if not path.exists():
        raise ModelFileError(f"{path}: no such model file; train one with 'qcflag train'")
    if path.is_dir():
        raise ModelFileError(f"{path}: is a directory; give the model file")
    with path.open("rb") as fh:
        magic = fh.read(4)
    if magic != b"PK\x03\x04":
        raise _refuse(path, "not a qcflag model file (not a zip archive; nothing was loaded)",
                      "give a file written by 'qcflag train'")
    try:
        with zipfile.ZipFile(path) as zf:
            infos = zf.infolist()
            names = [i.filename for i in infos]
            if len(set(names)) != len(names):
                raise _refuse(path, "duplicate members in the model archive")
            total = 0
            for info in infos:
                if info.filename not in (_MODEL_JSON, _INTEGRITY_JSON) and not _ARRAY_RE.match(
                    info.filename
                ):
                    raise _refuse(path, f"unexpected member {info.filename!r} in model file")
                limit = _MAX_JSON if info.filename.endswith(".json") else _MAX_MEMBER
                if info.file_size > limit:
                    raise _refuse(path, f"member {info.filename!r} is implausibly large")
                total += info.file_size
            if total > _MAX_TOTAL:
                raise _refuse(path, "model archive is implausibly large")
            for required in (_MODEL_JSON, _INTEGRITY_JSON):
                if required not in names:
                    raise _refuse(path, f"member {required!r} is missing")
            return {name: zf.read(name) for name in names}
    except (zipfile.BadZipFile, zipfile.LargeZipFile, EOFError, NotImplementedError) as exc:
        raise _refuse(path, f"damaged model archive ({exc})") from None


def _json(path: Path, data: bytes, what: str) -> Any:
    def _no_const(name: str) -> Any:
        raise ValueError(f"non-standard constant {name}")

    try:
        return json.loads(data.decode("utf-8"), parse_constant=_no_const)
    except (UnicodeDecodeError, ValueError, RecursionError) as exc:
        raise _refuse(path, f"{what} is not valid JSON ({exc.__class__.__name__})") from None


def _check_scalar_tree(path: Path, value: Any, where: str, depth: int = 0) -> None:
    """Allow only JSON scalars, lists and str-keyed dicts, not too deep."""
    if depth > 12:
        raise _refuse(path, f"{where} is nested too deeply")
    if isinstance(value, dict):
        for k, v in value.items():
            _check_scalar_tree(path, v, f"{where}.{k}", depth + 1)
    elif isinstance(value, list):
        for i, v in enumerate(value):
            _check_scalar_tree(path, v, f"{where}[{i}]", depth + 1)
    elif not isinstance(value, _SCALAR):
        raise _refuse(path, f"{where} has an unexpected type")


def _expect(path: Path, cond: bool, problem: str) -> None:
    if not cond:
        raise _refuse(path, problem)


def _validate_meta(path: Path, meta: Any) -> None:
    from qcflag.learn.estimators import ESTIMATORS

    _expect(path, isinstance(meta, dict), "model.json is not an object")
    _expect(path, meta.get("format") == FORMAT_NAME, "not a qcflag model file (wrong format name)")
    version = meta.get("format_version")
    _expect(path, isinstance(version, int) and not isinstance(version, bool),
            "format_version is missing or not an integer")
    if version > FORMAT_VERSION:
        raise ModelFileError(
            f"{path}: model file format {version} is newer than this qcflag reads "
            f"({FORMAT_VERSION}); upgrade qcflag (the file was written by qcflag "
            f"{meta.get('qcflag_version', '?')})"
        )
    _expect(path, version >= 1, f"unknown model file format version {version}")
    unknown = set(meta) - _TOP_KEYS
    _expect(path, not unknown, f"unknown keys {sorted(unknown)} in model.json")
    missing = _TOP_KEYS - set(meta)
    _expect(path, not missing, f"missing keys {sorted(missing)} in model.json")
    _expect(path, isinstance(meta["feature_set_version"], int), "feature_set_version malformed")
    _expect(path, isinstance(meta["scheme"], str), "scheme malformed")
    _expect(path, meta["rules"] is None or isinstance(meta["rules"], str), "rules malformed")
    _expect(path, isinstance(meta["card"], dict), "card malformed")
    _check_scalar_tree(path, meta["card"], "card")
    variables = meta["variables"]
    _expect(path, isinstance(variables, dict) and variables, "no variables in model.json")
    for var, spec in variables.items():
        _expect(path, isinstance(spec, dict) and set(spec) == _VAR_KEYS,
                f"variable {var!r}: unexpected keys")
        cls = ESTIMATORS.get(spec["estimator"]) if isinstance(spec["estimator"], str) else None
        _expect(path, cls is not None, f"variable {var!r}: unknown estimator class")
        names = spec["feature_names"]
        _expect(path, isinstance(names, list) and all(isinstance(n, str) for n in names),
                f"variable {var!r}: feature_names malformed")
        _expect(path, isinstance(spec["arrays"], list)
                and all(isinstance(a, str) and re.fullmatch(r"[A-Za-z0-9_]{1,64}", a)
                        for a in spec["arrays"]), f"variable {var!r}: array list malformed")
        state = spec["state"]
        _expect(path, isinstance(state, dict) and set(state) <= _STATE_KEYS
                and {"params", "fitted", "fitted_n_features"} <= set(state),
                f"variable {var!r}: estimator state has unexpected keys")
        _check_scalar_tree(path, state, f"variable {var!r} state")
        allowed = set(cls().get_params(deep=False))
        params = state["params"]
        _expect(path, isinstance(params, dict) and set(params) <= allowed,
                f"variable {var!r}: unknown estimator parameters")
        _expect(path, isinstance(state["fitted"], dict) and
                set(state["fitted"]) <= set(cls._scalar_attrs),
                f"variable {var!r}: unknown fitted attributes")
        nf = state["fitted_n_features"]
        _expect(path, isinstance(nf, int) and nf == len(names),
                f"variable {var!r}: feature count does not match its feature names")


def _load_array(path: Path, data: bytes, name: str) -> NDArray[Any]:
    try:
        arr = np.load(io.BytesIO(data), allow_pickle=False)
    except (ValueError, OSError, EOFError) as exc:
        raise _refuse(path, f"array {name!r} cannot be read safely ({exc})") from None
    if not isinstance(arr, np.ndarray) or arr.dtype.kind not in _ALLOWED_KINDS \
            or arr.dtype.fields is not None:
        raise _refuse(path, f"array {name!r} has a disallowed type")
    return arr


def load_model(path: str | os.PathLike[str]) -> QCModel:
    """Read a model file written by :func:`save_model`, refusing anything suspicious.

    Parameters
    ----------
    path : path-like
        The model file.

    Returns
    -------
    QCModel

    Raises
    ------
    ModelFileError
        If the file is missing, not a model archive, fails its integrity hash, has unknown
        members, keys, types or dtypes, or was written by a newer format version.
    """
    from qcflag.learn.estimators import ESTIMATORS
    from qcflag.learn.model import QCModel

    p = Path(path)
    members = _read_members(p)
    meta = _json(p, members[_MODEL_JSON], "model.json")
    # the version check comes first so a newer file gets the upgrade message
    if isinstance(meta, dict) and isinstance(meta.get("format_version"), int) \
            and meta["format_version"] > FORMAT_VERSION:
        _validate_meta(p, meta)
    integrity = _json(p, members[_INTEGRITY_JSON], "integrity.json")
    body = {k: v for k, v in members.items() if k != _INTEGRITY_JSON}
    per, digest = _digest(body)
    if not isinstance(integrity, dict) or integrity.get("algorithm") != "sha256" \
            or integrity.get("members") != per or integrity.get("digest") != digest:
        raise _refuse(p, "content does not match its integrity hash (corrupted or edited)")
    _validate_meta(p, meta)
    listed = {f"arrays/{v}/{a}.npy" for v, s in meta["variables"].items() for a in s["arrays"]}
    present = {k for k in members if k.startswith("arrays/")}
    _expect(p, listed == present, "array members do not match the list in model.json")
    estimators = {}
    for var, spec in meta["variables"].items():
        arrays = {a: _load_array(p, members[f"arrays/{var}/{a}.npy"], a) for a in spec["arrays"]}
        try:
            est = ESTIMATORS[spec["estimator"]]._restore(spec["state"], arrays)
        except (KeyError, ValueError, TypeError, IndexError) as exc:
            raise _refuse(p, f"variable {var!r}: estimator state is inconsistent ({exc})"
                          ) from None
        estimators[var] = est
    return QCModel._from_export(meta, estimators)
