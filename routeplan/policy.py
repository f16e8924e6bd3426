"""The frozen policy file: one JSON document, verified before use, never executable.

Layout (``schemas/policy-manifest.schema.json`` describes the manifest)::

    {"manifest": {...},
     "arrays": {"<name>": {"dtype": "float32" | "float64" | "int64",
                           "shape": [d0, d1, ...],
                           "data": "<base64 of the raw little-endian bytes, C order>"}},
     "sha256": "<hex>"}

``sha256`` is the SHA-256 of the canonical JSON of ``{"manifest": ..., "arrays": ...}``:
``json.dumps(obj, sort_keys=True, separators=(",", ":"))`` (ASCII escapes, no NaN or
infinity) encoded as UTF-8. The hash covers the content, not the file's layout, so the file
may be pretty-printed. Reading uses only :func:`json.loads`, :func:`base64.b64decode` and
:func:`numpy.frombuffer`: loading a policy cannot run code.

:func:`read_policy` refuses, with :class:`routeplan.errors.InputError` and a one-line
message, a file that is not valid JSON (for instance truncated), whose hash does not match,
whose format version is not supported, whose manifest fails the schema, or whose arrays are
malformed. Checks run in that order, so an edited file is reported as tampered before
anything in it is trusted.
"""

from __future__ import annotations

import base64
import binascii
import hashlib
import json
import math
import os
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Mapping, NamedTuple

import numpy as np

from routeplan.errors import InputError
from routeplan.files import write_atomically

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "SUPPORTED_VERSIONS",
    "RenderedPolicy",
    "content_digest",
    "decode_arrays",
    "encode_arrays",
    "read_policy",
    "render_policy",
    "training_fingerprint",
    "write_policy",
]

#: Format name written in ``manifest["format"]`` as ``"routeplan-policy/<version>"``.
FORMAT_NAME = "routeplan-policy"
#: Format version this code writes.
FORMAT_VERSION = 1
#: Format versions this code reads.
SUPPORTED_VERSIONS = frozenset({1})

_DTYPES = {"float32": "<f4", "float64": "<f8", "int64": "<i8"}
_SCHEMA_PATH = Path(__file__).resolve().parent / "schemas" / "policy-manifest.schema.json"
_MAX_ERROR_CHARS = 160


# --------------------------------------------------------------------------- public API


def write_policy(path: str | os.PathLike, manifest: Mapping[str, Any],
                 arrays: Mapping[str, np.ndarray]) -> str:
    """Write a policy file atomically and return its sha256.

    ``format`` and ``format_version`` are set to the current format and ``created`` to the
    current UTC time where the manifest leaves them out. The manifest must then satisfy
    ``schemas/policy-manifest.schema.json``. The file is written to a temporary file in the
    same folder and renamed over ``path``, so a reader never sees half a policy.

    Parameters
    ----------
    path : str or path-like
        Destination file.
    manifest : mapping
        JSON-compatible data (numpy scalars and arrays are converted to plain numbers and
        lists); no NaN or infinity.
    arrays : mapping of str to ndarray
        Named arrays of dtype float32, float64 or int64 (other integer and float dtypes
        are refused rather than converted silently).

    Returns
    -------
    str
        The hex sha256 stored in the file.

    Raises
    ------
    ValueError
        If the manifest or an array is not valid (a programming error, not user input).
    OutputError
        The file could not be written (no permission, read-only file system, disk full);
        ``path`` is left as it was.
    """
    rendered = render_policy(manifest, arrays)
    write_atomically(Path(path), lambda tmp: Path(tmp).write_text(rendered.text, encoding="utf-8"))
    return rendered.sha256


class RenderedPolicy(NamedTuple):
    """A policy file's text, its sha256 and the manifest it holds (:func:`render_policy`).

    Attributes
    ----------
    text : str
        The whole JSON document, ending with a newline.
    sha256 : str
        The hex sha256 stored in it.
    manifest : dict
        The manifest as written: plain JSON data with ``format``, ``format_version`` and
        ``created`` filled in, equal to what :func:`read_policy` returns for the file.
    """

    text: str
    sha256: str
    manifest: dict


def render_policy(manifest: Mapping[str, Any], arrays: Mapping[str, np.ndarray]) -> RenderedPolicy:
    """The text of a policy file, its sha256 and its completed manifest, without writing anything.

    For a caller that writes the policy together with other files (all or none), as
    ``routeplan freeze`` does with the policy card, and needs the manifest as written (its
    created time filled in) without parsing the text again. :func:`write_policy` is this
    plus an atomic write.

    Parameters
    ----------
    manifest : mapping
        As for :func:`write_policy`.
    arrays : mapping of str to ndarray
        As for :func:`write_policy`.

    Returns
    -------
    RenderedPolicy
        ``(text, sha256, manifest)``.

    Raises
    ------
    ValueError
        If the manifest or an array is not valid (a programming error, not user input).
    """
    body = {"manifest": _complete_manifest(manifest), "arrays": encode_arrays(arrays)}
    problem = _manifest_problem(body["manifest"], body["arrays"])
    if problem is not None:
        raise ValueError(f"cannot write policy: {problem}")
    digest = content_digest(body["manifest"], body["arrays"])
    document = {"manifest": body["manifest"], "arrays": body["arrays"], "sha256": digest}
    text = json.dumps(document, indent=1, allow_nan=False) + "\n"
    return RenderedPolicy(text, digest, body["manifest"])


def read_policy(path: str | os.PathLike) -> tuple[dict, dict[str, np.ndarray]]:
    """Read and verify a policy file.

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    manifest : dict
    arrays : dict of str to ndarray
        Fresh, writable arrays in native byte order.

    Raises
    ------
    routeplan.errors.InputError
        If the file cannot be read, is not a complete JSON policy document, its sha256 does
        not match its content, its format version is not supported, its manifest does not
        match the schema, or an array is malformed. The message is one line naming the file.
    """
    source = str(path)
    document = _load_document(Path(path), source)
    manifest, encoded = document["manifest"], document["arrays"]
    if content_digest(manifest, encoded) != document["sha256"]:
        raise InputError(
            "sha256 does not match the content: the policy file was changed or damaged "
            "after it was frozen; freeze it again",
            source=source,
        )
    _check_version(manifest, source)
    problem = _manifest_problem(manifest, encoded)
    if problem is not None:
        raise InputError(f"policy manifest is not valid: {problem}", source=source)
    try:
        arrays = decode_arrays(encoded)
    except ValueError as exc:
        raise InputError(f"policy arrays are malformed: {exc}", source=source) from None
    return manifest, arrays


def content_digest(manifest: Mapping[str, Any], encoded_arrays: Mapping[str, Any]) -> str:
    """SHA-256 (hex) of the canonical JSON of a manifest and its encoded arrays.

    Parameters
    ----------
    manifest : mapping
    encoded_arrays : mapping
        Arrays as stored in the file (see :func:`encode_arrays`).

    Returns
    -------
    str
    """
    canonical = json.dumps({"manifest": manifest, "arrays": encoded_arrays},
                           sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()


def encode_arrays(arrays: Mapping[str, np.ndarray]) -> dict[str, dict]:
    """Encode named arrays as ``{"dtype", "shape", "data"}`` entries.

    Parameters
    ----------
    arrays : mapping of str to ndarray
        dtype float32, float64 or int64.

    Returns
    -------
    dict
    """
    out: dict[str, dict] = {}
    for name, value in arrays.items():
        arr = np.asarray(value)
        kind = arr.dtype.name
        if not isinstance(name, str) or not name:
            raise ValueError(f"array names must be non-empty strings, got {name!r}")
        if kind not in _DTYPES:
            raise ValueError(f"array {name!r} has dtype {kind}; use float32, float64 or int64")
        raw = np.ascontiguousarray(arr, dtype=np.dtype(_DTYPES[kind])).tobytes()
        out[name] = {"dtype": kind, "shape": [int(d) for d in arr.shape],
                     "data": base64.b64encode(raw).decode("ascii")}
    return out


def decode_arrays(encoded: Mapping[str, Any]) -> dict[str, np.ndarray]:
    """Decode arrays stored by :func:`encode_arrays`, checking every field.

    Parameters
    ----------
    encoded : mapping

    Returns
    -------
    dict of str to ndarray

    Raises
    ------
    ValueError
        Naming the array and what is wrong with it.
    """
    if not isinstance(encoded, Mapping):
        raise ValueError("'arrays' must be an object")
    return {name: _decode_one(name, entry) for name, entry in encoded.items()}


def training_fingerprint(case_ids: Any, truth: Any, answers: Any = ()) -> str:
    """SHA-256 (hex) identifying a training set by its case ids, truth and answers.

    The fingerprint does not depend on row order: cases are sorted by id and answers by
    (case id, expert, answer). Missing truth is written as an empty value.

    Parameters
    ----------
    case_ids : sequence of str
    truth : sequence of str or None
        One entry per case id (None where unknown).
    answers : iterable of (case_id, expert, answer) triples, optional

    Returns
    -------
    str
    """
    ids = [str(c) for c in case_ids]
    truths = ["" if t is None else str(t) for t in truth]
    if len(ids) != len(truths):
        raise ValueError(f"{len(ids)} case ids but {len(truths)} truth values")
    payload = {
        "cases": sorted(zip(ids, truths)),
        "answers": sorted((str(c), str(e), str(a)) for c, e, a in answers),
    }
    text = json.dumps(payload, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


# --------------------------------------------------------------------------- reading


def _load_document(path: Path, source: str) -> dict:
    """Read the file and check the top-level shape of the document.

    A leading byte-order mark, which some editors add on saving, is ignored (RFC 8259,
    section 8.1, allows a parser to); the hash covers the content, not the bytes.
    """
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise InputError("no such policy file", source=source) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read the policy file ({_short(exc)})", source=source) from None
    try:
        document = json.loads(text, object_pairs_hook=_unique_keys, parse_constant=_no_constant)
    except (ValueError, RecursionError) as exc:
        raise InputError(
            f"not a complete policy file (invalid JSON: {_short(exc)}); was it cut short?",
            source=source,
        ) from None
    if not isinstance(document, dict) or set(document) != {"manifest", "arrays", "sha256"}:
        raise InputError(
            "not a policy file: expected exactly the members manifest, arrays and sha256",
            source=source,
        )
    if not isinstance(document["manifest"], dict) or not isinstance(document["arrays"], dict):
        raise InputError("not a policy file: manifest and arrays must be objects", source=source)
    if not isinstance(document["sha256"], str):
        raise InputError("not a policy file: sha256 must be a string", source=source)
    return document


def _check_version(manifest: dict, source: str) -> None:
    """Refuse a format this code does not read."""
    version = manifest.get("format_version")
    name = manifest.get("format")
    supported = ", ".join(str(v) for v in sorted(SUPPORTED_VERSIONS))
    if type(version) is not int or name != f"{FORMAT_NAME}/{version}":
        raise InputError(
            f"unrecognised policy format (format {name!r}, format_version {version!r}); "
            f"expected '{FORMAT_NAME}/N' with a matching integer format_version",
            source=source,
        )
    if version not in SUPPORTED_VERSIONS:
        raise InputError(
            f"policy format version {version} is not supported (this routeplan reads "
            f"version {supported}); freeze the policy again with this version",
            source=source,
        )


def _decode_one(name: str, entry: Any) -> np.ndarray:
    """Decode and check one stored array."""
    if not isinstance(entry, Mapping) or set(entry) != {"dtype", "shape", "data"}:
        raise ValueError(f"array {name!r} must have exactly dtype, shape and data")
    dtype, shape, data = entry["dtype"], entry["shape"], entry["data"]
    if dtype not in _DTYPES:
        raise ValueError(f"array {name!r} has dtype {dtype!r}; allowed: float32, float64, int64")
    if not isinstance(shape, list) or not all(type(d) is int and d >= 0 for d in shape):
        raise ValueError(f"array {name!r} has a bad shape {shape!r}")
    if not isinstance(data, str):
        raise ValueError(f"array {name!r} data must be a base64 string")
    try:
        raw = base64.b64decode(data.encode("ascii"), validate=True)
    except (binascii.Error, UnicodeEncodeError):
        raise ValueError(f"array {name!r} data is not valid base64") from None
    itemsize = np.dtype(_DTYPES[dtype]).itemsize
    expected = math.prod(shape) * itemsize
    if len(raw) != expected:
        raise ValueError(
            f"array {name!r} holds {len(raw)} bytes; shape {shape} of {dtype} needs {expected}"
        )
    flat = np.frombuffer(raw, dtype=np.dtype(_DTYPES[dtype]))
    return flat.astype(np.dtype(dtype)).reshape(shape)


def _unique_keys(pairs: list[tuple[str, Any]]) -> dict:
    """JSON object hook that refuses duplicate keys."""
    out: dict = {}
    for key, value in pairs:
        if key in out:
            raise ValueError(f"duplicate key {key!r}")
        out[key] = value
    return out


def _no_constant(token: str) -> Any:
    """Refuse NaN and Infinity, which are not JSON."""
    raise ValueError(f"{token} is not allowed")


# --------------------------------------------------------------------------- manifest


def _complete_manifest(manifest: Mapping[str, Any]) -> dict:
    """Plain-JSON copy of the manifest with format and created time filled in."""
    try:
        plain = json.loads(json.dumps(dict(manifest), default=_plain, allow_nan=False))
    except (TypeError, ValueError) as exc:
        raise ValueError(f"manifest is not JSON data: {exc}") from None
    plain.setdefault("format_version", FORMAT_VERSION)
    plain.setdefault("format", f"{FORMAT_NAME}/{plain['format_version']}")
    plain.setdefault("created", datetime.now(timezone.utc).isoformat(timespec="seconds"))
    if plain["format_version"] not in SUPPORTED_VERSIONS:
        raise ValueError(f"cannot write format_version {plain['format_version']!r}")
    head = ("format", "format_version", "created")
    return {**{key: plain[key] for key in head}, **plain}  # readable order; hash ignores it


def _plain(value: Any) -> Any:
    """json.dumps default: numpy scalars and arrays to plain numbers and lists."""
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"{type(value).__name__} is not JSON data")


def _manifest_problem(manifest: dict, encoded: Mapping[str, Any]) -> str | None:
    """First schema or consistency problem of a manifest, or None."""
    from jsonschema import Draft202012Validator

    validator = Draft202012Validator(_load_schema())
    errors = sorted(validator.iter_errors(manifest), key=lambda e: list(e.absolute_path))
    if errors:
        err = errors[0]
        where = "/".join(str(p) for p in err.absolute_path) or "(top level)"
        return f"{where}: {_short(err.message)}"
    return _consistency_problem(manifest, encoded)


def _consistency_problem(manifest: dict, encoded: Mapping[str, Any]) -> str | None:
    """Checks the schema cannot express: lengths, uniqueness, references, intervals."""
    feats = manifest["features"]
    if not len(feats["names"]) == len(feats["means"]) == len(feats["scales"]):
        return "features: names, means and scales must have the same length"
    for bound in ("lows", "highs"):
        if bound in feats and len(feats[bound]) != len(feats["names"]):
            return f"features: {bound} must have one value per feature name"
    names = [e["name"].lower() for e in manifest["experts"]]
    if len(set(names)) != len(names):
        return "experts: names must be unique (ignoring case)"
    k = len(manifest["labels"])
    matrix = manifest.get("cost_matrix")
    if matrix is not None and (len(matrix) != k or any(len(row) != k for row in matrix)):
        return f"cost_matrix must be {k} x {k} (one row and column per label)"
    missing = [a for a in manifest["router"].get("arrays", []) if a not in encoded]
    if missing:
        return f"router needs array {missing[0]!r}, which the file does not hold"
    for key, m in manifest["metrics"].items():
        if not m["low"] <= m["estimate"] <= m["high"]:
            return f"metrics/{key}: need low <= estimate <= high"
    return None


def _load_schema() -> dict:
    """The policy manifest JSON Schema."""
    with open(_SCHEMA_PATH, encoding="utf-8") as handle:
        return json.load(handle)


# --------------------------------------------------------------------------- writing


def _short(exc: BaseException | str) -> str:
    """First line of a message, cut to a readable length."""
    text = str(exc).strip().splitlines()
    line = text[0] if text else type(exc).__name__
    return line if len(line) <= _MAX_ERROR_CHARS else line[: _MAX_ERROR_CHARS - 3] + "..."
