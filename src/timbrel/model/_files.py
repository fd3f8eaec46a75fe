"""The model file and the checkpoint file: layouts, checksums, one atomic writer.

Both are ``.npz`` archives of plain arrays (never pickles) with a JSON header stored as
a uint8 array and a SHA-256 over the content, so a damaged or edited file is refused.
This module knows the layouts, not the estimator: it reads and writes named arrays and
headers, and :mod:`timbrel.model._estimator` turns them into an :class:`RBM`.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import re
import zipfile
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .._atomic import atomic_path
from .._errors import ModelFileError, ParameterError
from ..store import exists, is_url, local_copy
from ._kernels import F32
from ._params import is_int

__all__ = ["CHECKPOINT_FORMAT", "FORMAT_NAME", "FORMAT_VERSION", "PARAM_ARRAYS",
           "ModelArchive", "json_safe", "read_checkpoint", "read_model_archive",
           "write_checkpoint", "write_model_archive"]

FORMAT_NAME = "timbrel-rbm"
"""Name stored in every model file's header; files with another name are refused."""

FORMAT_VERSION = 1
"""Model-file format version written by this module; newer versions are refused."""

CHECKPOINT_FORMAT = "timbrel-checkpoint"
"""Name stored in every checkpoint's header."""

#: The parameter arrays of a model file, in their stored order (σ beside z for readers).
PARAM_ARRAYS = ("weights", "visible_bias", "hidden_bias", "log_variance", "sigma")
USER_NAME = re.compile(r"^[A-Za-z0-9_.-]{1,64}$")


def json_safe(value: Any) -> Any:
    """Python scalars for numpy ones; non-finite floats become None (JSON has no NaN)."""
    if isinstance(value, dict):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, (np.floating, float)):
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, np.ndarray):
        return json_safe(value.tolist())
    return value


def canonical_json(value: Any) -> str:
    """Sorted keys, no spaces, no NaN: the same text for the same content."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False)


def content_digest(arrays: list[tuple[str, np.ndarray]], header: Mapping[str, Any]) -> str:
    """SHA-256 over the arrays (name, dtype, shape, bytes; in the given order) and the header."""
    digest = hashlib.sha256()
    for name, array in arrays:
        digest.update(name.encode("utf-8") + b"\0")
        digest.update(array.dtype.str.encode("ascii") + b"\0")
        digest.update(json.dumps(list(array.shape)).encode("ascii") + b"\0")
        digest.update(np.ascontiguousarray(array).tobytes())
    digest.update(canonical_json(dict(header)).encode("utf-8"))
    return digest.hexdigest()


def _write_npz(path: Path, members: Mapping[str, np.ndarray]) -> Path:
    """Write ``members`` as one ``.npz`` under a temporary name, then rename it onto ``path``.

    The temporary name is ``.NAME.*.part``, as for every timbrel output, so the trainer
    finds and removes one that a killed run left behind.
    """
    with atomic_path(path) as tmp, open(tmp, "wb") as stream:
        np.savez(stream, allow_pickle=False, **members)  # type: ignore[arg-type]
    return path


# --------------------------------------------------------------------------------------
# model files
# --------------------------------------------------------------------------------------


def user_arrays(arrays: Mapping[str, Any] | None) -> dict[str, np.ndarray]:
    """Check the extra arrays a caller stores with a model (numeric, named simply)."""
    user: dict[str, np.ndarray] = {}
    for name, value in (arrays or {}).items():
        if not isinstance(name, str) or not USER_NAME.match(name):
            raise ParameterError(f"array name {name!r} must match {USER_NAME.pattern}")
        array = np.asarray(value)
        if array.dtype.hasobject or array.dtype.kind not in "biuf":
            raise ParameterError(f"array {name!r} must be numeric; got dtype {array.dtype}")
        user[name] = np.ascontiguousarray(array)
    return user


def write_model_archive(path: str | os.PathLike[str], params: Mapping[str, np.ndarray],
                        header: dict[str, Any], arrays: Mapping[str, Any] | None) -> Path:
    """Write a model file: ``params`` (every name of :data:`PARAM_ARRAYS`), user
    ``arrays`` and ``header`` (format, hyperparameters, history, metadata, ...), with the
    array lists and checksum added to the header."""
    user = user_arrays(arrays)
    ordered = [(f"param.{k}", params[k]) for k in PARAM_ARRAYS]
    ordered += [(f"user.{k}", user[k]) for k in sorted(user)]
    header = {"format": FORMAT_NAME, "format_version": FORMAT_VERSION, **header,
              "param_arrays": [name for name, _ in ordered if name.startswith("param.")],
              "user_arrays": sorted(user)}
    header["checksum"] = content_digest(ordered, header)
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise ParameterError(f"cannot save model to {path}: folder {folder} does not exist")
    contents = dict(ordered)
    contents["header"] = np.frombuffer(canonical_json(header).encode("utf-8"), dtype=np.uint8)
    return _write_npz(path, contents)


@dataclass(frozen=True)
class ModelArchive:
    """A verified model file's header (without the checksum), arrays and checksum."""

    header: dict[str, Any]
    hyperparameters: dict[str, Any]
    params: dict[str, np.ndarray]
    user: dict[str, np.ndarray]
    checksum: str


def refuse(path: Path, reason: str) -> ModelFileError:
    """The error for a model file that cannot be used: the file, then the reason."""
    return ModelFileError(f"{path}: {reason}")


def read_model_archive(path: str | os.PathLike[str]) -> ModelArchive:
    """Read and verify a model file's layout, arrays and checksum; refuses what
    :func:`timbrel.model.read_model_file` lists, hyperparameters aside. ``path`` may be
    a URL of an object store (:mod:`timbrel.store`): the file is fetched first."""
    if is_url(path):
        return _read_remote(os.fspath(path))
    path = Path(path)
    if not path.exists():
        raise refuse(path, "no such model file")
    if not path.is_file():
        raise refuse(path, "not a regular file")
    try:
        with open(path, "rb") as stream:
            magic = stream.read(4)
    except OSError as exc:
        raise refuse(path, f"cannot be read ({exc.strerror})") from None
    if not zipfile.is_zipfile(path):
        if magic == b"PK\x03\x04":
            raise refuse(path, "truncated (the zip directory at the end of the .npz is missing)")
        raise refuse(path, "not a model file (not an .npz zip archive)")
    try:
        with np.load(path, allow_pickle=False) as archive:
            return _read_archive(path, archive)
    except ModelFileError:
        raise
    except zipfile.BadZipFile as exc:
        raise refuse(path, f"damaged ({exc})") from None
    except Exception as exc:  # numpy's .npy header parser (ast) and zip
        # reader raise SyntaxError, TypeError, MemoryError, ... on a damaged file
        raise refuse(path, f"unreadable ({type(exc).__name__}: {exc})") from None


def _read_remote(url: str) -> ModelArchive:
    if not exists(url):
        raise ModelFileError(f"{url}: no such model file")
    with local_copy(url) as tmp:
        try:
            return read_model_archive(tmp)
        except ModelFileError as exc:
            raise ModelFileError(str(exc).replace(os.fspath(tmp), url)) from None


def _load_member(path: Path, archive: Any, name: str) -> np.ndarray:
    try:
        return archive[name]
    except ValueError as exc:
        if "pickle" in str(exc).lower() or "object arrays" in str(exc).lower():
            raise refuse(path, f"array {name!r} is a pickled object array (refused)") from None
        raise refuse(path, f"array {name!r} is unreadable ({exc})") from None
    except zipfile.BadZipFile as exc:
        raise refuse(path, f"array {name!r} is damaged ({exc})") from None
    except Exception as exc:  # a damaged .npy header fails in many ways
        raise refuse(path, f"array {name!r} is truncated or damaged "
                           f"({type(exc).__name__}: {exc})") from None


def _read_header(path: Path, archive: Any) -> dict[str, Any]:
    if "header" not in set(archive.files):
        raise refuse(path, "missing the header array (not a timbrel model file)")
    raw = _load_member(path, archive, "header")
    if raw.dtype != np.uint8 or raw.ndim != 1:
        raise refuse(path, f"header must be 1-D uint8; got {raw.dtype} {raw.shape}")
    try:
        header = json.loads(raw.tobytes().decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise refuse(path, f"header is not UTF-8 JSON ({exc})") from None
    if not isinstance(header, dict):
        raise refuse(path, "header is not a JSON object")
    if header.get("format") != FORMAT_NAME:
        raise refuse(path, f"format {header.get('format')!r} is not {FORMAT_NAME!r}")
    version: Any = header.get("format_version")
    if not is_int(version) or version < 1:
        raise refuse(path, f"invalid format version {version!r}")
    if version > FORMAT_VERSION:
        raise refuse(path, f"format version {version} is newer than this timbrel reads "
                           f"({FORMAT_VERSION}); upgrade timbrel")
    for key in ("hyperparameters", "n_features_in", "metadata", "param_arrays", "user_arrays",
                "checksum"):
        if key not in header:
            raise refuse(path, f"header lacks {key!r}")
    return header


def _listed_arrays(path: Path, archive: Any, header: dict[str, Any]) -> list[str]:
    user_names = header["user_arrays"]
    if not isinstance(user_names, list) or not all(
            isinstance(n, str) and USER_NAME.match(n) for n in user_names):
        raise refuse(path, "header lists invalid user array names")
    listed = [f"param.{k}" for k in PARAM_ARRAYS] + [f"user.{k}" for k in user_names]
    if header["param_arrays"] != listed[: len(PARAM_ARRAYS)]:
        raise refuse(path, f"header lists parameter arrays {header['param_arrays']!r}")
    names = set(archive.files)
    missing = [n for n in listed if n not in names]
    if missing:
        raise refuse(path, f"missing array(s) {', '.join(missing)}")
    unlisted = sorted(names - set(listed) - {"header"})
    if unlisted:
        raise refuse(path, f"holds array(s) not listed in its header: {', '.join(unlisted)}")
    return listed


def _check_params(path: Path, values: dict[str, np.ndarray], n_visible: int,
                  n_hidden: Any) -> None:
    shapes = {"param.weights": (n_visible, n_hidden), "param.visible_bias": (n_visible,),
              "param.hidden_bias": (n_hidden,), "param.sigma": (n_visible,)}
    log_var = values["param.log_variance"]
    if log_var.ndim != 1:
        raise refuse(path, f"array 'param.log_variance' must be 1-D; got shape {log_var.shape}")
    shapes["param.log_variance"] = log_var.shape
    for name, shape in shapes.items():
        array = values[name]
        if array.dtype != F32:
            raise refuse(path, f"array {name!r} must be float32; got {array.dtype}")
        if array.shape != shape:
            raise refuse(path, f"array {name!r} has shape {array.shape}; expected {shape}")
        if not np.isfinite(array).all():
            raise refuse(path, f"array {name!r} holds NaN or infinite values")
    if not (values["param.sigma"] > 0).all():
        raise refuse(path, "array 'param.sigma' holds non-positive values")


def _read_archive(path: Path, archive: Any) -> ModelArchive:
    header = _read_header(path, archive)
    listed = _listed_arrays(path, archive, header)
    loaded = [(name, _load_member(path, archive, name)) for name in listed]
    values = dict(loaded)
    n_visible = header["n_features_in"]
    hyper = dict(header["hyperparameters"]) if isinstance(header["hyperparameters"], dict) \
        else None
    if hyper is None or not is_int(n_visible) or n_visible < 1:
        raise refuse(path, "header holds invalid hyperparameters or n_features_in")
    if hyper.get("layout") is not None:
        hyper["layout"] = tuple(hyper["layout"])
    _check_params(path, values, n_visible, hyper.get("n_hidden"))
    stated = header.pop("checksum")
    if stated != content_digest(loaded, header):
        raise refuse(path, "checksum mismatch (the file was modified or damaged)")
    return ModelArchive(
        header=header, hyperparameters=hyper,
        params={k: values[f"param.{k}"] for k in PARAM_ARRAYS},
        user={n: values[f"user.{n}"] for n in header["user_arrays"]}, checksum=stated)


# --------------------------------------------------------------------------------------
# checkpoints
# --------------------------------------------------------------------------------------


def _checkpoint_digest(arrays: Mapping[str, np.ndarray]) -> str:
    return content_digest(sorted((k, v) for k, v in arrays.items() if k != "checksum"), {})


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(f"cannot store {type(obj).__name__} in a checkpoint")


def write_checkpoint(path: str | os.PathLike[str], state: Mapping[str, Any],
                     header: Mapping[str, Any]) -> Path:
    """Write a training state (from :meth:`RBM.get_state`) and a JSON header, atomically.

    Arrays of ``state`` are stored as ``state/NAME``; its other entries go into the
    header under ``"state"``; a SHA-256 over every member is stored as ``checksum``.
    """
    arrays = {f"state/{k}": np.asarray(v) for k, v in state.items() if isinstance(v, np.ndarray)}
    plain = {k: v for k, v in state.items() if not isinstance(v, np.ndarray)}
    full = {"format": CHECKPOINT_FORMAT, **header, "state": plain}
    arrays["header"] = np.frombuffer(json.dumps(full, default=_json_default).encode(), np.uint8)
    arrays["checksum"] = np.frombuffer(_checkpoint_digest(arrays).encode(), np.uint8)
    return _write_npz(Path(path), arrays)


def read_checkpoint(path: str | os.PathLike[str], *, advice: str
                    ) -> tuple[dict[str, Any], dict[str, Any]]:
    """Read and verify a checkpoint: its header and its full training state.

    Raises :class:`ModelFileError` naming the file, the reason, and ``advice``.

    Returns
    -------
    header : dict
        As written, without ``state``.
    state : dict
        For :meth:`RBM.set_state`: the header's ``state`` entries and the arrays.
    """
    path = Path(path)
    try:
        with np.load(path, allow_pickle=False) as data:
            members = {k: data[k] for k in data.files}
    except Exception as exc:  # any parser error of this file means damage
        raise ModelFileError(f"{path}: unreadable checkpoint ({type(exc).__name__}: {exc}); "
                             f"{advice}") from None
    stated = members.get("checksum")
    if stated is None or stated.dtype != np.uint8 or \
            stated.tobytes() != _checkpoint_digest(members).encode():
        raise ModelFileError(f"{path}: checkpoint damaged (checksum missing or wrong); {advice}")
    try:
        header = json.loads(members["header"].tobytes().decode())
        arrays = {k.split("/", 1)[1]: v for k, v in members.items() if k.startswith("state/")}
        if header.get("format") != CHECKPOINT_FORMAT:
            raise ModelFileError(f"{path}: not a timbrel checkpoint")
        state = {**header.pop("state"), **arrays}
    except (KeyError, ValueError, AttributeError, TypeError) as exc:
        raise ModelFileError(f"{path}: unusable checkpoint ({exc}); {advice}") from None
    return header, state
