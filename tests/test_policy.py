"""Tests of routeplan.policy: the frozen policy file, its hash and what read_policy refuses."""

import base64
import hashlib
import json
from pathlib import Path

import numpy as np
import pytest
from jsonschema import Draft202012Validator

from routeplan.errors import InputError
from routeplan.policy import (
    content_digest,
    read_policy,
    render_policy,
    training_fingerprint,
    write_policy,
)

SCHEMAS = Path(__file__).resolve().parents[1] / "schemas"


def _manifest():
    return {
        "labels": ["sound", "cracked", "warped"],
        "error_cost": 1.0,
        "features": {"names": ["width", "weight"], "means": [12.5, 3.25], "scales": [2.0, 0.5]},
        "experts": [
            {"name": "ana", "fee": 0.05, "capacity": 0.2, "price": 0.125},
            {"name": "bo.k", "fee": 0.1, "capacity": None, "price": 0.0},
        ],
        "router": {"kind": "plug-in", "hyperparameters": {"C": 1.0, "hidden": [16]},
                   "arrays": ["coef", "intercept", "order"]},
        "training": {"fingerprint": training_fingerprint(["c1", "c2"], ["sound", None],
                                                         [("c1", "ana", "sound")]),
                     "n_cases": 2, "n_answers": 1, "seed": 0},
        "metrics": {"system_cost": {"estimate": 0.21, "low": 0.18, "high": 0.24, "level": 0.95,
                                    "n": 400}},
    }


def _arrays():
    return {
        "coef": np.arange(12, dtype=np.float32).reshape(3, 4) / 7,
        "intercept": np.array([0.1, -2.5e-300, np.pi]),
        "order": np.array([[3, -1], [2**40, 0]], dtype=np.int64),
        "empty": np.zeros((0, 5)),
    }


@pytest.fixture
def policy_path(tmp_path):
    path = tmp_path / "policy.json"
    write_policy(path, _manifest(), _arrays())
    return path


def _load(path):
    return json.loads(path.read_text(encoding="utf-8"))


def _save(path, document, *, rehash):
    if rehash:
        document["sha256"] = content_digest(document["manifest"], document["arrays"])
    path.write_text(json.dumps(document), encoding="utf-8")


def test_round_trip_is_exact(policy_path):
    manifest, arrays = read_policy(policy_path)
    for key, value in _manifest().items():
        assert manifest[key] == value
    assert manifest["format"] == "routeplan-policy/1" and manifest["format_version"] == 1
    for name, value in _arrays().items():
        assert arrays[name].dtype == value.dtype
        np.testing.assert_array_equal(arrays[name], value)  # bit-exact, not approximate
        assert arrays[name].flags.writeable


def test_hash_is_sha256_of_canonical_json(policy_path):
    # hashlib's SHA-256 of json.dumps(sort_keys=True, separators=(",", ":")), the rule the
    # schema's description states; recomputed here independently of the module.
    document = _load(policy_path)
    body = {"manifest": document["manifest"], "arrays": document["arrays"]}
    canonical = json.dumps(body, sort_keys=True, separators=(",", ":")).encode("utf-8")
    assert document["sha256"] == hashlib.sha256(canonical).hexdigest()


def test_arrays_are_raw_little_endian(policy_path):
    # The stored bytes are numpy's '<f4' layout of the array (numpy as the reference).
    entry = _load(policy_path)["arrays"]["coef"]
    raw = base64.b64decode(entry["data"])
    assert raw == _arrays()["coef"].astype("<f4").tobytes()
    assert entry["dtype"] == "float32" and entry["shape"] == [3, 4]


def test_manifest_matches_schema(policy_path):
    # Reference validator: jsonschema's Draft 2020-12 implementation.
    schema = json.loads((SCHEMAS / "policy-manifest.schema.json").read_text())
    Draft202012Validator.check_schema(schema)
    Draft202012Validator(schema).validate(_load(policy_path)["manifest"])


def test_flipped_byte_in_array_data_is_refused(policy_path):
    text = policy_path.read_text()
    start = text.index(_load(policy_path)["arrays"]["intercept"]["data"])
    swapped = "B" if text[start + 3] != "B" else "C"
    policy_path.write_text(text[: start + 3] + swapped + text[start + 4 :])
    with pytest.raises(InputError, match="sha256 does not match"):
        read_policy(policy_path)


def test_flipped_byte_in_manifest_is_refused(policy_path):
    raw = bytearray(policy_path.read_bytes())
    at = raw.index(b"cracked")
    raw[at] ^= 0x01  # 'c' -> 'b'
    policy_path.write_bytes(bytes(raw))
    with pytest.raises(InputError, match="sha256 does not match"):
        read_policy(policy_path)


@pytest.mark.parametrize("keep", [0.0, 0.5, 0.99])
def test_truncated_file_is_refused(policy_path, keep):
    raw = policy_path.read_bytes()
    policy_path.write_bytes(raw[: int(len(raw) * keep)])
    with pytest.raises(InputError) as info:
        read_policy(policy_path)
    assert "cut short" in str(info.value)
    assert "\n" not in str(info.value) and str(policy_path) in str(info.value)


def test_edited_manifest_without_new_hash_is_refused(policy_path):
    document = _load(policy_path)
    document["manifest"]["experts"][0]["capacity"] = 0.9
    _save(policy_path, document, rehash=False)
    with pytest.raises(InputError, match="sha256 does not match"):
        read_policy(policy_path)


@pytest.mark.parametrize("rehash", [False, True])
def test_other_format_version_is_refused(policy_path, rehash):
    document = _load(policy_path)
    document["manifest"]["format_version"] = 2
    document["manifest"]["format"] = "routeplan-policy/2"
    _save(policy_path, document, rehash=rehash)
    expected = "version 2 is not supported" if rehash else "sha256 does not match"
    with pytest.raises(InputError, match=expected):
        read_policy(policy_path)


def test_unknown_dtype_is_refused_even_with_correct_hash(policy_path):
    document = _load(policy_path)
    document["arrays"]["order"]["dtype"] = "object"
    _save(policy_path, document, rehash=True)
    with pytest.raises(InputError, match="dtype 'object'"):
        read_policy(policy_path)


@pytest.mark.parametrize(
    "edit, message",
    [
        (lambda a: a["coef"].update(shape=[4, 4]), "needs 64"),
        (lambda a: a["coef"].update(shape=[3, -4]), "bad shape"),
        (lambda a: a["coef"].update(data="not base64!"), "base64"),
        (lambda a: a["coef"].pop("dtype"), "exactly dtype, shape and data"),
    ],
)
def test_malformed_arrays_are_refused(policy_path, edit, message):
    document = _load(policy_path)
    edit(document["arrays"])
    _save(policy_path, document, rehash=True)
    with pytest.raises(InputError, match=message):
        read_policy(policy_path)


def test_manifest_failing_schema_is_refused(policy_path):
    document = _load(policy_path)
    document["manifest"]["experts"][0]["name"] = "model"  # reserved word
    _save(policy_path, document, rehash=True)
    with pytest.raises(InputError, match="manifest is not valid: experts/0/name"):
        read_policy(policy_path)


def test_duplicate_keys_and_nan_are_refused(policy_path):
    text = policy_path.read_text()
    policy_path.write_text(text.replace('"error_cost": 1.0', '"error_cost": NaN', 1))
    with pytest.raises(InputError, match="invalid JSON"):
        read_policy(policy_path)
    policy_path.write_text('{"sha256": "", "sha256": "", "manifest": {}, "arrays": {}}')
    with pytest.raises(InputError, match="duplicate key"):
        read_policy(policy_path)


def test_missing_file_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match="no such policy file"):
        read_policy(tmp_path / "absent.json")


def test_write_refuses_bad_content(tmp_path):
    path = tmp_path / "p.json"
    with pytest.raises(ValueError, match="dtype int32"):
        write_policy(path, _manifest(), {"x": np.zeros(2, dtype=np.int32)})
    bad = _manifest()
    bad["features"]["means"] = [0.0]
    with pytest.raises(ValueError, match="same length"):
        write_policy(path, bad, _arrays())
    with pytest.raises(ValueError):
        write_policy(path, {**_manifest(), "error_cost": float("nan")}, _arrays())
    assert list(tmp_path.iterdir()) == []  # nothing written, no temporary file left


def test_write_replaces_atomically(tmp_path):
    path = tmp_path / "p.json"
    first = write_policy(path, _manifest(), _arrays())
    second = write_policy(path, {**_manifest(), "labels": ["a", "b", "c"]}, _arrays())
    assert first != second
    assert read_policy(path)[0]["labels"] == ["a", "b", "c"]
    assert [p.name for p in tmp_path.iterdir()] == ["p.json"]


def test_render_hands_back_the_manifest_the_file_holds(tmp_path):
    # The manifest render_policy returns is the one in its text, as the standard library's
    # json parser reads it (the reference), key order included, and write_policy writes
    # exactly that text: a caller needs no second parse.
    manifest = {**_manifest(), "created": "2026-01-02T03:04:05+00:00"}
    rendered = render_policy(manifest, _arrays())
    parsed = json.loads(rendered.text)["manifest"]
    assert rendered.manifest == parsed and list(rendered.manifest) == list(parsed)
    path = tmp_path / "p.json"
    assert write_policy(path, manifest, _arrays()) == rendered.sha256 == json.loads(rendered.text)["sha256"]
    assert path.read_text(encoding="utf-8") == rendered.text
    assert read_policy(path)[0] == rendered.manifest
    filled = render_policy(_manifest(), _arrays())  # created time filled in where left out
    assert filled.manifest["created"] == json.loads(filled.text)["manifest"]["created"]


def test_training_fingerprint_ignores_order_and_sees_changes():
    # Common practice: a content fingerprint is order-free but changes with any value.
    a = training_fingerprint(["c1", "c2"], ["x", None], [("c1", "e", "x"), ("c2", "e", "y")])
    b = training_fingerprint(["c2", "c1"], [None, "x"], [("c2", "e", "y"), ("c1", "e", "x")])
    c = training_fingerprint(["c1", "c2"], ["x", None], [("c1", "e", "x"), ("c2", "e", "x")])
    assert a == b != c and len(a) == 64


@pytest.mark.parametrize(
    "row, valid",
    [
        ({"case_id": "T1", "route": "model", "label": "sound", "expected_cost": 0.2,
          "cost_model:sound": 0.2, "cost_model:cracked": 0.8, "cost_ana": 0.25}, True),
        ({"case_id": "T2", "route": "ana", "label": "", "expected_cost": 0.25}, True),
        ({"case_id": "T3", "route": "ana", "label": "sound", "expected_cost": 0.25}, False),
        ({"case_id": "T4", "route": "model", "label": "", "expected_cost": 0.2}, False),
        ({"case_id": "T5", "route": "model", "label": "x", "expected_cost": 0.2, "x": 1}, False),
    ],
)
def test_decisions_row_schema(row, valid):
    # Reference validator: jsonschema's Draft 2020-12 implementation.
    schema = json.loads((SCHEMAS / "decisions-row.schema.json").read_text())
    Draft202012Validator.check_schema(schema)
    assert Draft202012Validator(schema).is_valid(row) is valid
