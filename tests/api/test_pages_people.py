"""The pages as a person reads them: every decision in the history, jobs whose version was deleted since,
one labelled meaning of ±, the exact strength only when rounding changed it, a sign-in message in the
page's own terms, and history-figure ticks that all read the same way."""

from __future__ import annotations

import html
import math
import re
import statistics

import httpx

from service.api.rendering import figures as plots


def test_model_page_history_decisions_deleted_versions_and_labels(tmp_path, kit):
    rows = kit.as_rows(kit.pump_table(150, seed=21))
    spec = {"target": "energy_kwh", "bases": [{"kind": "linear"}], "penalty": {"strengths": [0.01, 0.1, 1.0]},
            "cv": {"folds": 5, "seed": 1}}
    with kit.service(tmp_path / "svc", worker=True) as (base, store, _):
        ids = []
        for promote in ("always", "never"):
            r = httpx.post(f"{base}/v1/models/pump-hist/trainings", json={"data": {"rows": rows}, "spec": spec,
                                                                           "promote": promote})
            assert r.status_code == 202, r.text
            ids.append(kit.wait_job(base, r.json()["id"])["id"])
        store.delete_version("pump-hist", 2)
        page = httpx.get(f"{base}/models/pump-hist").text
        hist = page[page.index('<table class="grid history">'):]
        hist = hist[:hist.index("</table>")]
        cells = [re.sub(r"<[^>]+>", "", c).strip() for c in re.findall(r"<td[^>]*>(.*?)</td>", hist)]
        # newest first: v2 was not made live (promote: never), v1 went live
        assert cells[1:4] == ["v2", "not made live", "v1 (unchanged)"]
        assert cells[7:10] == ["v1", "went live", "— → v1"]
        assert "promote is 'never'" in html.unescape(hist)
        assert "Promotions" not in page
        job_row = page[page.index(f'data-job="{ids[1]}"'):]
        job_row = job_row[:job_row.index("</tr>")]
        assert "version 2" in job_row and "(since deleted)" in job_row and "not made live" in job_row
        overview = httpx.get(f"{base}/").text
        row = overview[overview.index(f'data-job="{ids[1]}"'):]
        assert "(since deleted)" in row[:row.index("</tr>")]
        assert "pump-hist@2" in overview  # data-deleted, for the script that redraws the table
        # ± is one standard error over the folds, and the label says so.
        chosen = store.get_manifest("pump-hist", 1)["training"]["chosen"]
        # the one-standard-error rule's standard error: the sample standard deviation of the 5 split errors
        # over sqrt(5) (Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd ed., 7.10)
        table = httpx.get(f"{base}/v1/models/pump-hist/versions/1/cv", params={"view": "all"}).json()["table"]
        folds = next(r["split_values"] for r in table if r["basis"] == chosen["basis"]
                     and r["strength"] == chosen["penalty"]["strength"])
        se = statistics.stdev(folds) / 5 ** 0.5
        assert math.isclose(se, chosen["se"], rel_tol=1e-9)
        assert f"± {se:.2g} (1 SE over 5 folds)" in page
        # The strengths of this grid print exactly at three digits: no "(exactly ...)" beside them.
        assert "(exactly " not in page


def test_sign_in_with_a_wrong_key_speaks_of_keys_not_headers(tmp_path, kit):
    with kit.service(tmp_path / "svc", worker=False) as (base, store, _):
        store.keys.create(["predict"], "viewer")
        r = httpx.post(f"{base}/login", data={"key": "tikhon_wrong", "next": "/"}, headers={"Origin": base})
        assert r.status_code == 401
        assert "Authorization" not in r.text
        assert "This key is unknown or revoked on this server" in r.text


def test_history_figure_time_ticks_all_read_the_same_way():
    def version(v, at):
        return {"version": v, "created_at": at, "summary": {
            "chosen": {"mean": 2.0 - v / 10, "std": 0.1, "metric": "rmse", "basis": {"kind": "linear"},
                       "penalty": {"strength": 1.0}}, "cv_summary": {"splits": 5}}}

    # Versions on both sides of midnight: the old labels mixed day numbers and clock times ("30, 01:12, 30").
    fig = plots.history_figure("m", [version(1, "2026-11-30T22:50:00Z"), version(2, "2026-12-01T01:12:00Z")], 2, [1, 2])
    fig.canvas.draw()
    labels = [t.get_text() for t in fig.axes[0].get_xticklabels() if t.get_text()]
    assert len(labels) >= 2 and all(re.fullmatch(r"\d\d-\d\d \d\d:\d\d", x) for x in labels), labels
    fig = plots.history_figure("m", [version(1, "2026-01-01T00:00:00Z"), version(2, "2026-06-01T00:00:00Z")], 2, [1])
    fig.canvas.draw()
    labels = [t.get_text() for t in fig.axes[0].get_xticklabels() if t.get_text()]
    assert labels and all(re.fullmatch(r"\d{4}-\d\d-\d\d", x) for x in labels), labels
