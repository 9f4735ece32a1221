"""The artifact format: exact round trip of arrays, reproducible bytes, and refusal of anything that
was changed after publishing or would need pickle."""

from __future__ import annotations

import io
import json
import zipfile

import numpy as np
import pytest
import sqlalchemy as sa

from service.errors import IntegrityFailure, NotFound
from service.store import FORMAT_VERSION, artifact
from service.store.schema import versions as versions_t


def _folder(store, name, version):
    return store.root / name / str(version)


def _set_catalog_sha(store, name, version, sha):
    with store.db.sql.begin() as conn:
        conn.execute(sa.update(versions_t).where(sa.and_(versions_t.c.model_name == name,
                                                         versions_t.c.version == version))
                     .values(manifest_sha256=sha))


def _fresh_store(store, kit):
    """A new Store on the same folder and catalog (an empty cache, like a new process)."""
    from service.store import Store

    return Store(store.settings, model_loader=kit.linear_loader)


def _rewrite_manifest(store, name, version, edit):
    """Edit the manifest and re-seal it in the catalog, so that only the check under test can fail."""
    path = _folder(store, name, version) / "manifest.json"
    manifest = json.loads(path.read_text())
    edit(manifest)
    data = json.dumps(manifest).encode()
    path.write_bytes(data)
    _set_catalog_sha(store, name, version, artifact.sha256_bytes(data))


def test_arrays_round_trip_bit_for_bit_with_dtypes(store):
    rng = np.random.default_rng(7)
    arrays = {
        "f64": rng.normal(size=(13, 5)),
        "f32": rng.normal(size=7).astype(np.float32),
        "i64": np.arange(-5, 5, dtype=np.int64),
        "u8": np.arange(9, dtype=np.uint8),
        "flag": np.array([True, False, True]),
        "c128": rng.normal(size=3) + 1j * rng.normal(size=3),
        "empty": np.zeros((0, 4)),
        "fortran": np.asfortranarray(rng.normal(size=(4, 3))),
        "scalar": np.array(3.25),
        "tiny": np.array([5e-324, -0.0, np.inf, -np.inf, np.nan]),
    }
    s2 = type(store)(store.settings, model_loader=lambda body, arrs: arrs)
    s2.publish("m", {"intercept": 0.0}, arrays)
    loaded = s2.load("m", 1).model
    assert sorted(loaded) == sorted(arrays)
    for key, arr in arrays.items():
        got = loaded[key]
        assert got.dtype == arr.dtype and got.shape == arr.shape, key
        assert got.tobytes() == np.ascontiguousarray(arr).tobytes(), key  # bit for bit, NaN and -0.0 included
    s2.close()


def test_arrays_file_is_reproducible(store, kit):
    body, arrays = kit.linear_artifact(50, seed=3)
    store.publish("m", body, arrays)
    store.publish("m", body, arrays)
    a = (_folder(store, "m", 1) / "arrays.npz").read_bytes()
    b = (_folder(store, "m", 2) / "arrays.npz").read_bytes()
    assert a == b
    # An independent reader: numpy's own npz loader without pickle.
    with np.load(io.BytesIO(a), allow_pickle=False) as npz:
        np.testing.assert_array_equal(npz["coef"], arrays["coef"])
    assert zipfile.ZipFile(io.BytesIO(a)).testzip() is None


def test_manifest_records_what_the_format_promises(store, kit):
    body, arrays = kit.linear_artifact(6)
    row = store.publish("m", body, arrays, job_id="0123456789abcdef0123456789abcdef")
    raw = (_folder(store, "m", 1) / "manifest.json").read_bytes()
    manifest = json.loads(raw)
    assert manifest["format"] == "tikhon-model" and manifest["format_version"] == FORMAT_VERSION
    assert manifest["name"] == "m" and manifest["version"] == 1
    assert manifest["job_id"] == "0123456789abcdef0123456789abcdef"
    assert manifest["training"] == body
    assert set(manifest["libraries"]) >= {"python", "numpy", "scikit-learn"}
    assert manifest["libraries"]["numpy"] == np.__version__
    assert manifest["arrays"]["sha256"] == artifact.sha256_file(_folder(store, "m", 1) / "arrays.npz")
    assert manifest["arrays"]["members"]["coef"] == {"dtype": "<f8", "shape": [6]}
    assert row["checksum"] == artifact.sha256_bytes(raw)
    assert store.get_manifest("m", 1) == manifest


@pytest.mark.parametrize("bad", [
    np.array([{"a": 1}], dtype=object),
    np.array(["text"]),
    np.zeros(2, dtype=[("x", "<f8"), ("y", "<i4")]),
    np.array(["2026-01-01"], dtype="datetime64[D]"),
])
def test_publish_refuses_arrays_that_are_not_plain_numbers(store, bad):
    with pytest.raises(IntegrityFailure, match="plain numeric"):
        store.publish("m", {"intercept": 0.0}, {"coef": np.ones(2), "bad": bad})
    assert store.list_models() == []
    assert not (store.root / "m").exists()


def test_publish_refuses_non_arrays_and_bad_array_names(store):
    with pytest.raises(IntegrityFailure, match="not a numpy array"):
        store.publish("m", {"intercept": 0.0}, {"coef": [1.0, 2.0]})
    with pytest.raises(IntegrityFailure, match="array name"):
        store.publish("m", {"intercept": 0.0}, {"../coef": np.ones(2)})


@pytest.mark.parametrize("body, where", [
    ({"intercept": float("nan")}, "$.intercept"),
    ({"intercept": 0.0, "cv": [{"rmse": float("inf")}]}, "$.cv[0].rmse"),
    ({"intercept": 0.0, "x": np.float64(1.0)}, None),
    ({"intercept": 0.0, "x": {1: 2}}, "non-string key"),
])
def test_publish_refuses_manifest_bodies_that_are_not_strict_json(store, body, where):
    if isinstance(body.get("x"), np.floating):
        # np.float64 subclasses float, so it is valid JSON: it must be stored, not refused.
        store.publish("m", body, {"coef": np.ones(1)})
        assert store.get_manifest("m", 1)["training"]["x"] == 1.0
        return
    with pytest.raises(IntegrityFailure) as info:
        store.publish("m", body, {"coef": np.ones(1)})
    assert where in info.value.detail
    assert store.list_models() == []


def test_flipped_byte_in_arrays_is_refused(store, kit):
    body, arrays = kit.linear_artifact(20)
    store.publish("m", body, arrays)
    path = _folder(store, "m", 1) / "arrays.npz"
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x01
    path.write_bytes(bytes(data))
    with pytest.raises(IntegrityFailure) as info:
        _fresh_store(store, kit).load("m", 1)
    assert "arrays.npz is damaged or was changed" in info.value.detail
    assert "SHA-256" in info.value.detail


def test_edited_manifest_is_refused(store, kit):
    body, arrays = kit.linear_artifact(3)
    store.publish("m", body, arrays)
    path = _folder(store, "m", 1) / "manifest.json"
    path.write_text(path.read_text().replace('"intercept": 0.5', '"intercept": 0.75'))
    fresh = _fresh_store(store, kit)
    with pytest.raises(IntegrityFailure, match="manifest.json was changed after publishing"):
        fresh.load("m", 1)
    with pytest.raises(IntegrityFailure, match="changed after publishing"):
        fresh.get_manifest("m", 1)


def test_edit_is_refused_even_when_already_cached_elsewhere(store, kit):
    body, arrays = kit.linear_artifact(3)
    store.publish("m", body, arrays)
    store.load("m", 1)  # cached in this process
    (_folder(store, "m", 1) / "manifest.json").write_text("{}")
    with pytest.raises(IntegrityFailure):
        _fresh_store(store, kit).load("m", 1)


def test_unknown_format_version_is_refused(store, kit):
    body, arrays = kit.linear_artifact(3)
    store.publish("m", body, arrays)
    _rewrite_manifest(store, "m", 1, lambda m: m.update(format_version=FORMAT_VERSION + 1))
    with pytest.raises(IntegrityFailure, match=r"format_version 4; this Tikhon reads 1, 2, 3"):
        _fresh_store(store, kit).load("m", 1)


def test_manifest_moved_to_another_folder_is_refused(store, kit):
    for seed in (1, 2):
        body, arrays = kit.linear_artifact(3, seed=seed)
        store.publish("m", body, arrays)
    _rewrite_manifest(store, "m", 2, lambda m: m.update(version=1))
    with pytest.raises(IntegrityFailure, match="describes 'm' version 1, not the folder"):
        _fresh_store(store, kit).load("m", 2)


def test_manifest_declaring_an_object_array_is_refused(store, kit):
    body, arrays = kit.linear_artifact(3)
    store.publish("m", body, arrays)
    _rewrite_manifest(store, "m", 1, lambda m: m["arrays"]["members"]["coef"].update(dtype="|O"))
    with pytest.raises(IntegrityFailure, match="would need pickle"):
        _fresh_store(store, kit).load("m", 1)


def test_array_that_needs_pickle_is_refused_even_with_matching_checksums(store, kit):
    body, arrays = kit.linear_artifact(3)
    store.publish("m", body, arrays)
    folder = _folder(store, "m", 1)
    # Rebuild arrays.npz with an object array (numpy writes it with pickle when allowed to) and re-seal
    # both checksums, as an attacker with write access to the store folder could.
    buf = io.BytesIO()
    np.savez(buf, coef=np.array([1, "x", None], dtype=object), scale=np.ones(3))
    (folder / "arrays.npz").write_bytes(buf.getvalue())

    def reseal(m):
        m["arrays"]["sha256"] = artifact.sha256_bytes(buf.getvalue())
        m["arrays"]["bytes"] = len(buf.getvalue())

    _rewrite_manifest(store, "m", 1, reseal)
    with pytest.raises(IntegrityFailure, match="needs pickle to load"):
        _fresh_store(store, kit).load("m", 1)


def test_extra_or_missing_members_are_refused(store, kit):
    body, arrays = kit.linear_artifact(3)
    store.publish("m", body, arrays)
    folder = _folder(store, "m", 1)
    buf = io.BytesIO()
    np.savez(buf, coef=arrays["coef"], scale=arrays["scale"], extra=np.ones(1))
    (folder / "arrays.npz").write_bytes(buf.getvalue())
    _rewrite_manifest(store, "m", 1, lambda m: m["arrays"].update(sha256=artifact.sha256_bytes(buf.getvalue())))
    with pytest.raises(IntegrityFailure, match=r"holds arrays \['coef', 'extra', 'scale'\]"):
        _fresh_store(store, kit).load("m", 1)


def test_missing_files_are_reported(store, kit):
    body, arrays = kit.linear_artifact(3)
    store.publish("m", body, arrays)
    (_folder(store, "m", 1) / "arrays.npz").unlink()
    with pytest.raises(IntegrityFailure, match="arrays.npz is missing"):
        _fresh_store(store, kit).load("m", 1)
    (_folder(store, "m", 1) / "manifest.json").unlink()
    with pytest.raises(IntegrityFailure, match="manifest.json is missing"):
        _fresh_store(store, kit).load("m", 1)


def test_loader_failure_is_an_integrity_failure(store, kit):
    body, arrays = kit.linear_artifact(3)
    store.publish("m", {k: v for k, v in body.items() if k != "intercept"}, arrays)
    with pytest.raises(IntegrityFailure, match="could not be rebuilt"):
        store.load("m", 1)
    with pytest.raises(NotFound):
        store.load("m", 2)
