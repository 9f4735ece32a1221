"""Round trip with the real engine (store issue, "Done means"): a model from ``tune`` → publish → load
in a fresh process predicts the same values bit for bit.

Data: the diabetes data set that scikit-learn ships (``sklearn.datasets.load_diabetes``, 442 rows,
10 features), a public reference data set installed with the package, not invented data.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn.datasets import load_diabetes

from service.engine import tune
from service.store import Store

SPECS = {
    "linear+poly2": {"target": "y", "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2]}],
                     "penalty": {"kind": "l2", "strengths": {"min": 1e-3, "max": 1e3, "count": 12}},
                     "cv": {"folds": 5, "seed": 0}},
    "rbf": {"target": "y", "bases": [{"kind": "rbf", "widths": [1.0, 2.0], "centers": 60}],
            "penalty": {"kind": "l2", "strengths": {"min": 1e-3, "max": 1e2, "count": 8}},
            "cv": {"folds": 4, "seed": 1}},
}


@pytest.fixture(scope="module")
def diabetes():
    d = load_diabetes()  # shipped with scikit-learn
    data = {name: d.data[:, i] for i, name in enumerate(d.feature_names)}
    data["y"] = d.target
    return data


@pytest.mark.parametrize("spec_name", sorted(SPECS))
def test_tune_publish_load_in_fresh_process_bit_for_bit(settings, kit, tmp_path, diabetes, spec_name):
    result = tune(diabetes, SPECS[spec_name])
    body, arrays = result.to_artifact()
    with Store(settings) as store:  # the engine's own loader
        row = store.publish("diabetes", body, arrays, job_id="0" * 32)
        assert row["summary"]["chosen"] == json.loads(json.dumps(result.chosen))
        in_process = store.load("diabetes", row["version"])
    # New rows: perturbed training rows, seeded, so the inputs differ from what was fitted.
    rng = np.random.default_rng(42)
    inputs = {k: v + rng.normal(scale=0.01, size=v.shape) for k, v in diabetes.items() if k != "y"}
    np.savez(tmp_path / "inputs.npz", **inputs)
    expected = result.model.predict(inputs)
    assert in_process.model.predict(inputs).tobytes() == expected.tobytes()

    res = kit.run_proc("predict", "--store", str(settings.store), "--url", settings.database_url or "",
                       "--name", "diabetes", "--version", str(row["version"]), "--inputs", str(tmp_path / "inputs.npz"))
    out = json.loads(res.stdout)
    assert out["checksum"] == row["checksum"]
    fresh = np.array([float.fromhex(v) for v in out["predictions"]])
    assert fresh.tobytes() == expected.tobytes()  # bit for bit
    assert np.isfinite(fresh).all() and fresh.std() > 0


def _to_old_shape(store, name, version, *, inline: bool):
    """Rewrite a published version as an earlier Tikhon wrote it, byte for byte in its key names: the
    engine's body under ``model`` (so ``manifest["model"]["model"]``), the fitted model's count of CV
    splits as ``cv.folds``, each CV row's metric per split as ``folds``; ``inline``: format version 1
    (the CV table inside manifest.json), else format version 2 (``cv.npz`` with a member ``folds``).
    The catalog's checksum is re-sealed, as the old code's publish would have recorded it."""
    import sqlalchemy as sa

    from service.store import artifact
    from service.store.schema import versions as versions_t

    folder = store.root / name / str(version)
    manifest = json.loads((folder / "manifest.json").read_text())
    body = manifest.pop("training")
    body["model"]["cv"] = {("folds" if k == "splits" else k): v for k, v in body["model"]["cv"].items()}
    columns, meta = store.cv_columns(name, version)
    rows = artifact.cv_rows(columns, meta, slice(None))
    (folder / artifact.CV_FILE).unlink()
    if inline:
        manifest["format_version"] = 1
        body["cv_table"] = [{("folds" if k == "split_values" else k): v for k, v in r.items()} for r in rows]
    else:
        manifest["format_version"] = 2
        columns["folds"] = columns.pop("split_values")
        info = artifact.write_arrays(folder, columns, file=artifact.CV_FILE)
        body["cv_table"] = {**info, "rows": meta["rows"], "bases": meta["bases"],
                            "keys": ["folds" if k == "split_values" else k for k in meta["keys"]]}
    manifest["model"] = body
    data = json.dumps(manifest).encode()
    (folder / "manifest.json").write_bytes(data)
    with store.db.sql.begin() as conn:
        conn.execute(sa.update(versions_t).where(sa.and_(versions_t.c.model_name == name,
                                                         versions_t.c.version == version))
                     .values(manifest_sha256=artifact.sha256_bytes(data)))


@pytest.mark.parametrize("inline", [True, False], ids=["format-1-inline-table", "format-2-cv-npz"])
def test_a_manifest_written_with_the_old_key_names_still_loads(settings, diabetes, inline):
    """Versions published before the renames (``model`` → ``training``, the fitted model's ``cv.folds``
    → ``cv.splits``, a CV row's ``folds`` → ``split_values``) load, predict and list as new ones do,
    under today's names only."""
    result = tune(diabetes, SPECS["linear+poly2"])
    body, arrays = result.to_artifact()
    with Store(settings) as store:
        new = store.publish("diabetes", body, arrays)["version"]
        old = store.publish("diabetes", body, arrays)["version"]
        want = store.get_manifest("diabetes", new)
        want_columns, want_meta = store.cv_columns("diabetes", new)
        _to_old_shape(store, "diabetes", old, inline=inline)
    with Store(settings) as store:  # a fresh process's view: nothing cached
        got = store.get_manifest("diabetes", old)
        assert "model" not in got and got["format_version"] == (1 if inline else 2)
        assert got["training"] == want["training"]  # every key renamed, in its place, values untouched
        assert got["training"]["model"]["cv"]["splits"] == 5 and "folds" not in got["training"]["model"]["cv"]
        assert list(got["training"]["cv_table"][0]) == list(result.cv_table[0])
        columns, meta = store.cv_columns("diabetes", old)
        assert meta["keys"] == want_meta["keys"] and "split_values" in meta["keys"]
        assert sorted(columns) == sorted(want_columns)
        np.testing.assert_array_equal(columns["split_values"], want_columns["split_values"])
        loaded = store.load("diabetes", old)
        assert loaded.model.cv == result.model.cv
        inputs = {k: v for k, v in diabetes.items() if k != "y"}
        assert loaded.model.predict(inputs).tobytes() == result.model.predict(inputs).tobytes()
        assert store.list_versions("diabetes")[1]["summary"]["chosen"] == json.loads(json.dumps(result.chosen))
