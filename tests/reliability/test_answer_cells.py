"""What an answer's cells may hold: no bare null without a reason, no formula a spreadsheet would run.

Found by an outside probe: ``flow_lps: 1e308`` answered ``"value": null`` (the schema said number, no
warning said why) and ``nan`` in CSV; a column named ``@zone`` or an unseen label ``=HYPERLINK(...)``
came back in CSV cells that a spreadsheet runs as formulas; an empty column name was accepted.
"""

from __future__ import annotations

import csv
import io
import json
import subprocess
import sys

import httpx
import numpy as np

FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")  # OWASP "CSV Injection" guidance, the characters it lists


def _zone_model(store, rk):
    """The demo's numbers plus a categorical column named '@zone' (a hostile but legal column name)."""
    from service.engine import tune

    cols = rk.demo_rows(300, 0)
    cols["@zone"] = np.array(["north", "south", "east"] * 100, dtype=object)
    spec = {**rk.QUICK_SPEC, "categorical": ["@zone"]}
    body, arrays = tune(cols, spec).to_artifact()
    row = store.publish("zones", body, arrays)
    store.set_live("zones", row["version"], actor="test", reason="fixture")


def test_an_overflowing_prediction_is_null_with_a_warning_and_declared_nullable(rk, tmp_path):
    from livesvc import live_service

    with live_service(tmp_path, worker=False) as (base, store, _):
        rk.publish_demo(store, "pumps", seed=0)
        rows = [{"flow_lps": 1e308, "head_m": 35.0}, {"flow_lps": 70.0, "head_m": 35.0}]
        r = httpx.post(f"{base}/v1/models/pumps/predictions", json={"rows": rows, "interval_level": 0.9}, timeout=30)
        assert r.status_code == 200, r.text
        first, second = r.json()["predictions"]
        assert first["value"] is None and first["interval"] == [None, None]
        assert any("not a finite number" in w and "overflowed" in w for w in first["warnings"]), first
        assert isinstance(second["value"], float) and not any("finite" in w for w in second["warnings"])

        text = httpx.post(f"{base}/v1/models/pumps/predictions?interval_level=0.9", timeout=30,
                          content="flow_lps,head_m\n1e308,35\n70,35\n",
                          headers={"Content-Type": "text/csv", "Accept": "text/csv"}).text
        table = list(csv.reader(io.StringIO(text)))
        assert table[0] == ["value", "lower", "upper", "warnings"]
        assert table[1][:3] == ["", "", ""] and "overflowed" in table[1][3]
        assert float(table[2][0]) == second["value"]
        assert "nan" not in text.lower().replace("finite", "") and "inf" not in text.split("\n", 1)[1].split(",")[0]

        schema = httpx.get(f"{base}/openapi.json", timeout=30).json()["components"]["schemas"]["PredictedRow"]
        kinds = {option.get("type") for option in schema["properties"]["value"]["anyOf"]}
        assert kinds == {"number", "null"}


def test_csv_answers_neutralize_formula_cells(rk, tmp_path):
    from livesvc import live_service

    with live_service(tmp_path, worker=False) as (base, store, settings):
        _zone_model(store, rk)
        hostile = '=HYPERLINK("http://example.invalid/x","open")'
        body = f'flow_lps,head_m,@zone\n70,35,north\n70,35,"{hostile.replace(chr(34), chr(34) * 2)}"\n-5,35,+east\n'
        r = httpx.post(f"{base}/v1/models/zones/predictions", content=body, timeout=30,
                       headers={"Content-Type": "text/csv", "Accept": "text/csv"})
        assert r.status_code == 200, r.text
        table = list(csv.reader(io.StringIO(r.text)))
        for row in table[1:]:
            value, warnings = row[0], row[-1]
            float(value)  # numbers stay numbers (a negative one keeps its '-')
            assert not warnings.startswith(FORMULA_STARTS), warnings
        # the warning of the hostile label starts with the column name '@zone': neutralized, still readable
        assert table[2][-1].startswith("'@zone=") and hostile in table[2][-1]
        assert table[3][-1].startswith("flow_lps=-5 is below") and "@zone='+east' was not seen" in table[3][-1]

        # The CLI's --out file, through the client.
        out = tmp_path / "answer.csv"
        rows = tmp_path / "rows.csv"
        rows.write_text(body)
        env = rk.settings_env({})
        cli = subprocess.run([sys.executable, "-m", "service.cli", "--url", base, "predict", "zones", "--data",
                              str(rows), "--out", str(out)], env=env, capture_output=True, text=True, timeout=120)
        assert cli.returncode == 0, cli.stderr
        written = list(csv.reader(io.StringIO(out.read_text())))
        for row in written[1:]:
            assert not row[-1].startswith(FORMULA_STARTS) and not row[0].startswith(FORMULA_STARTS)
        assert written[2][-1].startswith("'@zone=")


def test_an_empty_column_name_is_refused_at_training(rk, tmp_path):
    from livesvc import live_service

    with live_service(tmp_path, worker=False) as (base, store, _):
        cols = rk.demo_rows(50, 1)
        text = rk.csv_text(cols).replace("flow_lps,head_m,energy_kwh", "flow_lps,,energy_kwh", 1)
        r = httpx.post(f"{base}/v1/models/pumps/trainings", timeout=30,
                       json={"spec": {**rk.QUICK_SPEC, "features": ["flow_lps"]}, "data": {"csv": text}})
        body = rk.assert_problem(r, 422)
        assert "column 2 of the training data has an empty name" in body["detail"], body
        assert body["errors"][0]["field"] == "columns[1]"
        assert json.loads(json.dumps(store.jobs.list())) == []  # nothing was queued
