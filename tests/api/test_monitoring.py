"""Input drift and outcomes through the HTTP API.

References: the population stability index is Σ (r − t)·ln(r / t) over bins (common practice; the
thresholds 0.1 and 0.25 are rules of thumb of the trade, not a standard). The figures the service reports
are checked against values computed here, independently, from the numbers the service itself answered
(predictions and 0.9 intervals) and the rows sent: RMSE, MAE and coverage by their textbook definitions.
"""

from __future__ import annotations

import math

import httpx
import numpy as np
import pytest

from service.client import Client

PSI_WATCH, PSI_ACT = 0.1, 0.25  # rules of thumb (common practice)


def psi(training, recent):
    t = np.maximum(np.asarray(training, float), 1e-4)
    r = np.asarray(recent, float)
    r = np.maximum(r / r.sum(), 1e-4)
    return float(np.sum((r - t) * np.log(r / t)))


@pytest.fixture(scope="module")
def served(worker_service, kit):
    base, store, _ = worker_service
    tk = Client(base)
    cols = kit.pump_table(600, seed=21)
    for name in ("pump-steady", "pump-shifted", "pump-scored", "pump-off"):
        job = tk.wait(tk.train(name, rows=kit.as_rows(cols), spec=kit.SPEC, promote="always"), timeout=300)
        assert job["state"] == "succeeded", job
    return base, tk, cols


def inputs_of(kit, n, seed, flow_factor=1.0):
    q = kit.pump_table(n, seed=seed)
    return {"flow_lps": (q["flow_lps"] * flow_factor).tolist(), "head_m": q["head_m"].tolist()}, q


def test_a_shifted_input_shows_a_psi_above_act_and_the_others_below_watch(served, kit):
    base, tk, _ = served
    steady, _ = inputs_of(kit, 800, seed=31)
    shifted, _ = inputs_of(kit, 800, seed=31, flow_factor=1.6)  # flow 60 % higher than in training
    for name, rows in (("pump-steady", steady), ("pump-shifted", shifted)):
        for i in range(40):  # single rows (the hot path's queue) ...
            tk.predict(name, rows=[{"flow_lps": rows["flow_lps"][i], "head_m": rows["head_m"][i]}])
        tk.predict(name, columns={k: v[40:] for k, v in rows.items()})  # ... and one batch
    report = {name: httpx.get(f"{base}/v1/models/{name}/inputs").json() for name in ("pump-steady", "pump-shifted")}
    for name, rep in report.items():
        assert rep["rows"] == 800 and rep["version"] == 1, rep
        feats = {f["name"]: f for f in rep["features"]}
        assert set(feats) == {"flow_lps", "head_m"} and all(f["kind"] == "numeric" for f in feats.values())
        for f in feats.values():
            assert len(f["training"]) == len(f["edges"]) + 1 == len(f["recent"])
            assert math.isclose(sum(f["training"]), 1.0) and math.isclose(sum(f["recent"]), 1.0)
            assert f["psi"] == pytest.approx(psi(f["training"], f["recent"]), rel=1e-9)
    st = {f["name"]: f for f in report["pump-steady"]["features"]}
    sh = {f["name"]: f for f in report["pump-shifted"]["features"]}
    assert st["flow_lps"]["psi"] < PSI_WATCH and st["head_m"]["psi"] < PSI_WATCH
    assert sh["flow_lps"]["psi"] > PSI_ACT and sh["flow_lps"]["flag"] == "act"
    assert sh["head_m"]["psi"] < PSI_WATCH and sh["head_m"]["flag"] is None
    # rows above the training range: counted independently from the training maximum
    train_max = max(served[2]["flow_lps"])
    above = sum(v > train_max for v in shifted["flow_lps"])
    assert above > 100 and sh["flow_lps"]["outside_range"] == pytest.approx(above / 800)
    assert report["pump-shifted"]["outside_range_rows"] == above
    assert any("retrain suggested" in w and "flow_lps" in w for w in report["pump-shifted"]["warnings"])
    assert not any("retrain" in w for w in report["pump-steady"]["warnings"])
    # the model's own answer carries the same suggestion
    model = httpx.get(f"{base}/v1/models/pump-shifted").json()
    assert any("retrain suggested" in w and "flow_lps" in w for w in model["monitoring_warnings"])
    assert httpx.get(f"{base}/v1/models/pump-steady").json()["monitoring_warnings"] == []


def test_outcomes_report_the_real_error_computed_from_the_answers(served, kit):
    base, tk, _ = served
    q_rows, q = inputs_of(kit, 300, seed=41)
    truth = q["energy_kwh"]
    cv = tk.version("pump-scored", 1)["chosen"]
    offset = 5.0 * cv["mean"]  # several CV RMSEs off: a world that changed
    y = truth + offset
    answer = tk.predict("pump-scored", columns=q_rows, interval_level=0.9)["predictions"]
    value = np.array([p["value"] for p in answer])
    lo = np.array([p["interval"][0] for p in answer])
    hi = np.array([p["interval"][1] for p in answer])
    rows = [{"flow_lps": a, "head_m": b, "energy_kwh": c} for a, b, c in zip(q_rows["flow_lps"], q_rows["head_m"], y.tolist())]
    r = httpx.post(f"{base}/v1/models/pump-scored/outcomes", json={"rows": rows[:120]})
    assert r.status_code == 202, r.text
    assert r.json() == {"model": "pump-scored", "version": 1, "accepted": 120, "skipped": 0}
    assert httpx.post(f"{base}/v1/models/pump-scored/outcomes", json={"rows": rows[120:], "version": 1}).status_code == 202
    rep = httpx.get(f"{base}/v1/models/pump-scored/outcomes").json()
    e = y - value
    assert rep["rows"] == 300
    assert rep["metrics"]["rmse"] == pytest.approx(math.sqrt(np.mean(e ** 2)), rel=1e-9)  # RMSE by definition
    assert rep["metrics"]["mae"] == pytest.approx(np.mean(np.abs(e)), rel=1e-9)
    assert rep["metrics"]["coverage90"] == pytest.approx(np.mean((y >= lo) & (y <= hi)))
    assert rep["metrics"]["rmse"] > 3 * cv["mean"]
    assert rep["cv"] == {"metric": "rmse", "mean": cv["mean"], "std": cv["std"]}
    assert sum(s["rows"] for s in rep["series"]) == 300 and rep["series"][-1]["rmse"] is not None
    assert any("retrain suggested" in w and "RMSE" in w for w in rep["warnings"])
    model = httpx.get(f"{base}/v1/models/pump-scored").json()
    assert any("live RMSE" in w for w in model["monitoring_warnings"])


def test_bad_outcomes_and_windows_are_refused_with_the_field_named(served, kit):
    base, tk, _ = served
    r = httpx.post(f"{base}/v1/models/pump-off/outcomes", json={"rows": [{"flow_lps": 50.0, "head_m": 30.0}]})
    assert r.status_code == 422 and "energy_kwh" in r.json()["detail"]
    r = httpx.post(f"{base}/v1/models/pump-off/outcomes", json={"rows": [], "versoin": 1})
    assert r.status_code == 422 and "versoin" in r.json()["detail"]
    r = httpx.get(f"{base}/v1/models/pump-off/inputs", params={"since": "last tuesday"})
    assert r.status_code == 422 and "since" in r.json()["detail"] and "7d" in r.json()["detail"]
    r = httpx.get(f"{base}/v1/models/pump-off/inputs", params={"version": 9})
    assert r.status_code == 404
    empty = httpx.get(f"{base}/v1/models/pump-off/outcomes", params={"since": "2h"}).json()
    assert empty["rows"] == 0 and empty["metrics"] == {"rmse": None, "mae": None, "coverage90": None}


def test_cli_monitor_prints_the_psi_table_and_the_outcomes(served, kit):
    import os
    import subprocess
    import sys

    base, tk, _ = served
    shifted, _ = inputs_of(kit, 200, seed=51, flow_factor=1.6)
    tk.predict("pump-off", columns=shifted)
    expected = {f["name"]: f for f in tk.inputs("pump-off")["features"]}
    env = dict(os.environ, TIKHON_URL=base, COLUMNS="200")
    env.pop("TIKHON_KEY", None)
    run = subprocess.run([sys.executable, "-m", "service.cli", "monitor", "pump-off", "--since", "2h"],
                         capture_output=True, text=True, env=env, timeout=120)
    assert run.returncode == 0, run.stderr
    cells = [line.replace("│", " ").replace("┃", " ").split() for line in run.stdout.splitlines()]
    lines = {c[0]: c for c in cells if c}
    assert lines["flow_lps"][2] == f"{expected['flow_lps']['psi']:.3f}" and lines["flow_lps"][3] == "act"
    assert lines["head_m"][2] == f"{expected['head_m']['psi']:.3f}"
    assert "(200 rows)" in run.stdout and "outcomes (0 scored rows)" in run.stdout
    assert "retrain suggested: input flow_lps has drifted" in " ".join(run.stdout.split())


def test_figures_answer_images_and_their_numbers_and_the_page_shows_them(served, kit):
    import re

    base, tk, _ = served
    page = httpx.get(f"{base}/models/pump-shifted")
    assert page.status_code == 200 and 'id="monitoring"' in page.text
    srcs = re.findall(r'<img src="([^"]+)"', page.text)
    mon = [s.replace("&amp;", "&") for s in srcs if "/plots/drift" in s or "/plots/outside-range" in s or "/plots/live-error" in s]
    assert len(mon) == 3
    for src in mon:
        img = httpx.get(base + src)
        assert img.status_code == 200 and img.headers["content-type"] == "image/svg+xml" and b"<svg" in img.content[:400]
        png = httpx.get(base + src + "&format=png")
        assert png.content[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
    drift = httpx.get(f"{base}/v1/models/pump-shifted/plots/drift", headers={"Accept": "application/json"}).json()
    assert drift["features"] == tk.inputs("pump-shifted")["features"]
    err = httpx.get(f"{base}/v1/models/pump-scored/plots/live-error", headers={"Accept": "application/json"}).json()
    assert err["series"] == tk.outcomes("pump-scored")["series"] and err["cv"]["metric"] == "rmse"
    bad = httpx.get(f"{base}/v1/models/pump-shifted/plots/drift", params={"format": "gif"})
    assert bad.status_code == 422 and "format" in bad.json()["detail"]
