"""Errors that say what to fix: what a person reads when a name, a level, a delimiter, a value or a field
is wrong, and the warnings a version carries about the data it was trained on."""

from __future__ import annotations

import httpx
import numpy as np
import pytest

from service.engine import tune


@pytest.fixture(scope="module")
def svc(tmp_path_factory, kit):
    root = tmp_path_factory.mktemp("msg")
    with kit.service(root, worker=False) as (base, store, settings):
        result = tune(kit.pump_table(120, seed=31), kit.SPEC)
        body, arrays = result.to_artifact()
        store.publish("pump-energy", body, arrays)
        store.set_live("pump-energy", 1, actor="test", reason="fixture")
        # A model with a categorical input (zone: north / south), for the unseen-level cases.
        cols = kit.pump_table(90, seed=32)
        cols["zone"] = np.array(["north", "south", "north"] * 30)
        zoned = tune(cols, dict(kit.SPEC, categorical=["zone"]))
        body, arrays = zoned.to_artifact()
        store.publish("pump-zoned", body, arrays)
        store.set_live("pump-zoned", 1, actor="test", reason="fixture")
        yield base, store


def problem(r: httpx.Response, status: int) -> dict:
    assert r.status_code == status, (r.status_code, r.text)
    assert r.headers["content-type"] == "application/problem+json"
    return r.json()


def test_mistyped_model_name_lists_the_closest_names(svc):
    base, _ = svc
    row = {"rows": [{"flow_lps": 50.0, "head_m": 30.0}]}
    body = problem(httpx.post(f"{base}/v1/models/pump-enrgy/predictions", json=row), 404)
    assert body["detail"].startswith("no model named 'pump-enrgy' exists; the closest name on this server: 'pump-energy'.")
    assert "has no live version" not in body["detail"]
    assert body["errors"][0]["closest"] == ["pump-energy"]
    # The same answer on the other routes that take a model name.
    body = problem(httpx.get(f"{base}/v1/models/pump-enrgy"), 404)
    assert "'pump-energy'" in body["detail"]
    body = problem(httpx.post(f"{base}/v1/models/pump-enrgy/versions/1/predictions", json=row), 404)
    assert "closest name on this server: 'pump-energy'" in body["detail"]
    # Nothing close: the count of models, and where they are listed.
    body = problem(httpx.get(f"{base}/v1/models/boiler"), 404)
    assert body["detail"] == ("no model named 'boiler' exists; this server holds 2 models, none with a similar name "
                              "(GET /v1/models lists them). Check the spelling, or train it first.")


def test_unseen_level_warning_lists_known_levels_and_refuse_mode(svc):
    base, _ = svc
    rows = [{"flow_lps": 50.0, "head_m": 30.0, "zone": "east"}, {"flow_lps": 50.0, "head_m": 30.0, "zone": "north"},
            {"flow_lps": 50.0, "head_m": 30.0, "zone": 7}]
    r = httpx.post(f"{base}/v1/models/pump-zoned/predictions", json={"rows": rows[:2]})
    assert r.status_code == 200, r.text
    w = r.json()["predictions"]
    assert w[0]["warnings"] == ["zone='east' was not seen in training; its effect is taken as zero "
                                "(known levels: 'north', 'south')"]
    assert w[1]["warnings"] == []
    # A number sent as a label is named as a number.
    r = httpx.post(f"{base}/v1/models/pump-zoned/predictions", json={"rows": [rows[2]]})
    assert r.json()["predictions"][0]["warnings"][0].startswith("zone=7 (a number) was not seen in training")
    # refuse: 422 naming the row, the value as sent and the known levels; nothing predicted.
    body = problem(httpx.post(f"{base}/v1/models/pump-zoned/predictions", json={"rows": rows[:2] + [dict(rows[0], zone="west")], "unseen_levels": "refuse"}), 422)
    assert body["detail"].startswith("rows[0].zone = 'east' was not seen in training (row(s) 0, 2); known levels of "
                                     "'zone': 'north', 'south'.")
    assert [e["field"] for e in body["errors"]] == ["rows[0].zone", "rows[2].zone"]
    # refuse with only known levels answers normally; CSV takes the option as a query parameter.
    r = httpx.post(f"{base}/v1/models/pump-zoned/predictions", json={"rows": rows[1:2], "unseen_levels": "refuse"})
    assert r.status_code == 200 and r.json()["predictions"][0]["warnings"] == []
    body = problem(httpx.post(f"{base}/v1/models/pump-zoned/predictions?unseen_levels=refuse",
                              content="flow_lps,head_m,zone\n50,30,west\n", headers={"content-type": "text/csv"}), 422)
    assert "'west' was not seen in training" in body["detail"]
    body = problem(httpx.post(f"{base}/v1/models/pump-zoned/predictions", json={"rows": rows[:1], "unseen_levels": "no"}), 422)
    assert "'warn'" in body["detail"] and "'refuse'" in body["detail"]


def test_semicolon_and_tab_csv_name_the_delimiter(svc):
    base, _ = svc
    for text, label in (("flow_lps;head_m\n50;30\n", "semicolon (;)"), ("flow_lps\thead_m\n50\t30\n", "tab")):
        body = problem(httpx.post(f"{base}/v1/models/pump-energy/predictions", content=text,
                                  headers={"content-type": "text/csv"}), 422)
        assert body["detail"].startswith(f"body is separated by {label}, not commas")
        assert "columns found: 'flow_lps', 'head_m'" in body["detail"]
        assert "are missing" not in body["detail"]


def test_text_where_a_number_belongs_is_shown_as_written(svc):
    base, _ = svc
    body = problem(httpx.post(f"{base}/v1/models/pump-energy/predictions",
                              json={"rows": [{"flow_lps": "minus five", "head_m": 30.0}]}), 422)
    assert "np.str_" not in body["detail"] and "categorical" not in body["detail"]
    assert body["detail"].startswith("input column 'flow_lps' must be numeric but holds text, e.g. row 0 = 'minus five'; "
                                     "this model was trained with 'flow_lps' as a number, so send a number there")


def test_training_warns_about_unused_text_and_little_data(kit):
    cols = kit.pump_table(5, seed=3)
    cols["zone"] = np.array(["a", "b", "a", "b", "a"])
    res = tune(cols, {"target": "energy_kwh", "bases": [{"kind": "linear"}], "cv": {"folds": 5, "seed": 1}})
    assert res.warnings[0] == "column zone is text and was not used; list it under categorical to use it"
    # Rule of thumb, common practice: about ten rows per validation fold and per coefficient.
    assert res.warnings[1].startswith("little data: 1 rows per validation fold (5 rows, 5 folds; floor 10) and 2.5 rows "
                                      "per basis term (5 rows, 2 terms in the chosen basis; floor 10)")
    assert "common practice" in res.warnings[1]
    big = tune(kit.pump_table(400, seed=3), {"target": "energy_kwh", "bases": [{"kind": "linear"}],
                                             "cv": {"folds": 5, "seed": 1}})
    assert not any(w.startswith(("little data", "column ")) for w in big.warnings)


def test_enum_errors_name_the_allowed_values_and_problems_read_for_people(svc):
    base, _ = svc
    rows = [{"flow_lps": 10.0 + i, "head_m": 20.0, "energy_kwh": 3.0 * i} for i in range(30)]
    body = problem(httpx.post(f"{base}/v1/models/pump-energy/trainings",
                              json={"data": {"rows": rows}, "promote": "if-better"}), 422)
    assert body["title"] == "Invalid request" and body["type"] == "/problems/invalid-request"
    assert ("'if-better' is not one of the allowed values 'always', 'if_better', 'never' (did you mean 'if_better'?)"
            in body["detail"])
    body = problem(httpx.post(f"{base}/v1/models/pump-energy/trainings",
                              json={"data": {"rows": rows}, "spec": {"target": "energy_kwh", "bases": [{"kind": "poly"}]}}), 422)
    assert ("spec field 'bases.0.kind': 'poly' is not one of the allowed values 'linear', 'polynomial', 'rbf' "
            "(did you mean 'polynomial'?)") in body["detail"]
    cat = httpx.get(f"{base}/problems").json()
    for slug, info in cat.items():
        assert "``" not in info["description"] and "Base class" not in info["description"], slug
        assert info["description"] != info["title"], slug
    assert cat["not-found"]["description"].startswith("The model, version, job or key does not exist")
