"""Export of a version: the JSON document evaluated by the README's numpy evaluator, and the scikit-learn
pipeline loaded in a process that cannot import Tikhon, both against the service's own predictions.

References: the README's evaluator is independent code (numpy only: powers by ``**``, RBF distances in
difference form, indicators by comparison); the pipeline is made of scikit-learn's own StandardScaler,
PolynomialFeatures / Nystroem (rbf kernel), OneHotEncoder and LinearRegression, so its predictions come
from scikit-learn as an independent reference implementation of the same formula.
"""

from __future__ import annotations

import json
import os
import pathlib
import re
import subprocess
import sys

import httpx
import numpy as np
import pytest

from service.client import Client

README = pathlib.Path(__file__).resolve().parents[2] / "README.md"


def readme_evaluator():
    text = README.read_text(encoding="utf-8")
    block = re.search(r"<!-- export-evaluator -->\s*```python\n(.*?)```", text, re.S)
    assert block, "the README's export evaluator block is missing"
    code = "\n".join(line[2:] if line.startswith("  ") else line for line in block.group(1).splitlines())
    scope: dict = {}
    exec(compile(code, "README.md:export-evaluator", "exec"), scope)  # the README's own code, run as printed
    return scope["evaluate"]


def zoned(kit, n, seed):
    cols = kit.pump_table(n, seed=seed)
    rng = np.random.default_rng(seed)
    zones = rng.choice(["north-ridge", "mill-lane", "river-flats"], size=n)
    cols["energy_kwh"] = cols["energy_kwh"] + np.where(zones == "mill-lane", 4.0, 0.0)
    return {**cols, "zone": zones.astype(object)}


BASES = {
    "poly": [{"kind": "polynomial", "degrees": [2, 3]}],
    "rbf": [{"kind": "rbf", "widths": [0.7, 1.5], "centers": 24}],
    "lin": [{"kind": "linear"}],
}


@pytest.fixture(scope="module")
def trained(worker_service, kit):
    base, _, _ = worker_service
    tk = Client(base)
    out = {}
    for label, bases in BASES.items():
        cols = zoned(kit, 260, seed=3)
        spec = {**kit.SPEC, "bases": bases, "categorical": ["zone"]}
        job = tk.wait(tk.train(f"pump-{label}", rows=kit.as_rows(cols), spec=spec, promote="always"), timeout=300)
        assert job["state"] == "succeeded", job
        out[label] = job["version"]
    return base, tk, out


def query(kit):
    q = zoned(kit, 40, seed=11)
    rows = {k: q[k].tolist() for k in ("flow_lps", "head_m", "zone")}
    rows["zone"][0] = "quarry-road"  # a level never seen in training: contributes zero on both sides
    return rows


@pytest.mark.parametrize("label", list(BASES))
def test_json_export_evaluated_by_the_readme_code_equals_the_service(trained, kit, label):
    base, tk, versions = trained
    doc = tk.export(f"pump-{label}", versions[label], format="json")
    assert doc["format"] == "tikhon-export" and doc["format_version"] == 1
    assert doc["source"]["model"] == f"pump-{label}" and doc["source"]["version"] == versions[label]
    assert doc["source"]["manifest_sha256"] == tk.version(f"pump-{label}", versions[label])["checksums"]["manifest_sha256"]
    assert doc["basis"]["kind"] == {"poly": "polynomial", "rbf": "rbf", "lin": "linear"}[label]
    assert [c["name"] for c in doc["categorical"]] == ["zone"]
    assert doc["categorical"][0]["levels"] == ["mill-lane", "north-ridge", "river-flats"]
    json.dumps(doc, allow_nan=False)  # plain JSON (RFC 8259: no NaN or Infinity)
    rows = query(kit)
    served = np.array([p["value"] for p in tk.predict(f"pump-{label}", columns=rows, version=versions[label])["predictions"]])
    got = readme_evaluator()(doc, rows)
    np.testing.assert_allclose(got, served, rtol=1e-12, atol=1e-12 * np.abs(served).max())


@pytest.mark.parametrize("label", list(BASES))
def test_sklearn_export_loads_without_tikhon_and_predicts_like_the_service(trained, kit, tmp_path, label):
    base, tk, versions = trained
    data = tk.export(f"pump-{label}", versions[label], format="sklearn")
    path = tmp_path / "model.joblib"
    path.write_bytes(data)
    rows = query(kit)
    (tmp_path / "rows.json").write_text(json.dumps(rows))
    # A separate interpreter where importing Tikhon fails: the file needs scikit-learn, not our package.
    code = (
        "import sys, json; sys.modules['service'] = None\n"
        "import joblib, pandas as pd\n"
        f"pipe = joblib.load({str(path)!r})\n"
        f"frame = pd.DataFrame(json.load(open({str(tmp_path / 'rows.json')!r})))\n"
        "print(json.dumps([float(v) for v in pipe.predict(frame)]))\n"
        "print(type(pipe).__module__)\n"
    )
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, cwd=tmp_path)
    assert run.returncode == 0, run.stderr
    lines = run.stdout.strip().splitlines()
    assert lines[1] == "sklearn.pipeline"
    got = np.array(json.loads(lines[0]))
    served = np.array([p["value"] for p in tk.predict(f"pump-{label}", columns=rows, version=versions[label])["predictions"]])
    np.testing.assert_allclose(got, served, rtol=1e-9, atol=1e-9 * np.abs(served).max())


def test_export_refuses_an_unknown_format_and_a_missing_version(trained):
    base, tk, versions = trained
    r = httpx.get(f"{base}/v1/models/pump-lin/versions/{versions['lin']}/export", params={"format": "onnx"})
    assert r.status_code == 422 and r.headers["content-type"].startswith("application/problem+json")
    assert "format" in r.text and "sklearn" in r.text
    r = httpx.get(f"{base}/v1/models/pump-lin/versions/99/export")
    assert r.status_code == 404
    with pytest.raises(ValueError, match="onnx"):
        tk.export("pump-lin", versions["lin"], format="onnx")


def cli_env(base):
    env = dict(os.environ, TIKHON_URL=base, COLUMNS="200")
    env.pop("TIKHON_KEY", None)
    return env


def test_cli_export_writes_the_live_version(trained, tmp_path):
    base, tk, versions = trained
    out = tmp_path / "exported.json"
    run = subprocess.run([sys.executable, "-m", "service.cli", "export", "pump-poly", "--out", str(out)],
                         capture_output=True, text=True, timeout=120, env=cli_env(base))
    assert run.returncode == 0, run.stderr
    assert f"wrote {out}" in " ".join(run.stdout.split())
    doc = json.loads(out.read_text())
    assert doc["source"] == tk.export("pump-poly", versions["poly"])["source"]
    bad = subprocess.run([sys.executable, "-m", "service.cli", "export", "pump-poly", "--format", "onnx"],
                         capture_output=True, text=True, timeout=120, env=cli_env(base))
    assert bad.returncode == 2 and "--format 'onnx' is not offered" in bad.stderr + bad.stdout
