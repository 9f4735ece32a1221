"""A full tour of the HTTP API that records every answer (method, route template, status, media type, body).

Used by the contract tests: every recorded JSON answer is validated against the schema that
``/openapi.json`` declares for its operation and status. The tour uses the invented pump-station demo
data, small enough to train in seconds.
"""

from __future__ import annotations

import csv
import io
import time
from dataclasses import dataclass
from typing import Any

import httpx

from service.demo import DEMO_SPEC, pump_stations

# The prediction routes' paths (change them here only).
PREDICT_LIVE = "/v1/models/{name}/predictions"
PREDICT_VERSION = "/v1/models/{name}/versions/{version}/predictions"


@dataclass
class Answer:
    method: str
    template: str
    status: int
    media_type: str
    body: Any


def small_spec() -> dict[str, Any]:
    spec = dict(DEMO_SPEC)
    spec["bases"] = [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2, 3]}]
    spec["penalty"] = {"kind": "l2", "strengths": {"min": 1e-3, "max": 1e2, "count": 8}}
    return spec


def table_csv(cols: dict[str, Any]) -> str:
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    names = list(cols)
    w.writerow(names)
    w.writerows(zip(*(list(cols[k]) for k in names)))
    return out.getvalue()


class Tour:
    def __init__(self, base: str, key: str | None = None):
        self.http = httpx.Client(base_url=base, timeout=120.0,
                                 headers={"Authorization": f"Bearer {key}"} if key else {})
        self.answers: list[Answer] = []

    def call(self, method: str, template: str, *, expect: int | tuple[int, ...], params: dict | None = None,
             path: dict | None = None, keep: bool = True, **kw: Any) -> Any:
        url = template.format(**(path or {}))
        r = self.http.request(method, url, params=params, **kw)
        want = (expect,) if isinstance(expect, int) else expect
        assert r.status_code in want, (method, url, r.status_code, r.text[:500])
        mt = r.headers.get("content-type", "").split(";")[0].strip()
        body: Any = r.json() if mt.endswith("json") else r.content
        if keep or not any(a.template == template and a.body == body for a in self.answers[-3:]):
            self.answers.append(Answer(method.lower(), template, r.status_code, mt, body))
        return body

    def wait(self, job_id: str) -> dict[str, Any]:
        end = time.monotonic() + 300  # a readiness wait: fails only if the job never ends
        while True:
            job = self.call("GET", "/v1/trainings/{job_id}", expect=200, path={"job_id": job_id}, keep=False)
            if job["state"] in ("succeeded", "failed", "cancelled"):
                return job
            assert time.monotonic() < end, job
            time.sleep(0.05)

    def run(self) -> list[Answer]:
        c = self.call
        name = "pump-tour"
        c("GET", "/healthz", expect=200)
        c("GET", "/readyz", expect=200)
        c("GET", "/problems", expect=200)
        c("GET", "/problems/{slug}", expect=200, path={"slug": "not-found"})
        cols = pump_stations(400, seed=3)
        rows = [dict(zip(cols, vals)) for vals in zip(*(cols[k].tolist() for k in cols))]
        job = c("POST", "/v1/models/{name}/trainings", expect=202, path={"name": name},
                json={"data": {"rows": rows}, "spec": small_spec(), "promote": "always"})
        c("GET", "/v1/trainings", expect=200, params={"model": name})
        first = self.wait(job["id"])
        assert first["state"] == "succeeded", first
        # a second version, trained from a CSV upload, that does not go live
        nxt = pump_stations(300, seed=4, month=1)
        job2 = c("POST", "/v1/models/{name}/trainings", expect=202, path={"name": name},
                 files={"file": ("next.csv", table_csv(nxt), "text/csv")}, data={"promote": "never"})
        second = self.wait(job2["id"])
        assert second["state"] == "succeeded", second
        # a job that fails (a target that does not exist), and one cancelled while queued or running
        bad = c("POST", "/v1/models/{name}/trainings", expect=202, path={"name": name},
                json={"data": {"rows": rows}, "spec": {**small_spec(), "target": "head_m", "features": ["flow_lps"],
                                                        "cv": {"scheme": "grouped", "group_by": "hour", "folds": 30}}})
        self.wait(bad["id"])
        c("GET", "/v1/models", expect=200)
        c("GET", "/v1/models/{name}", expect=200, path={"name": name})
        c("GET", "/v1/models/{name}/versions", expect=200, path={"name": name})
        for v in (1, 2):
            c("GET", "/v1/models/{name}/versions/{version}", expect=200, path={"name": name, "version": v})
        c("GET", "/v1/models/{name}/versions/{version}/cv", expect=200, path={"name": name, "version": 1})
        c("GET", "/v1/models/{name}/versions/{version}/cv", expect=200, path={"name": name, "version": 1},
          params={"view": "all", "offset": 0, "limit": 5})
        c("GET", "/v1/models/{name}/versions/{version}/path", expect=200, path={"name": name, "version": 1})
        for kind in ("cv", "path", "residuals"):
            t = "/v1/models/{name}/versions/{version}/plots/" + kind
            c("GET", t, expect=200, path={"name": name, "version": 1})
            c("GET", t, expect=200, path={"name": name, "version": 1}, params={"format": "png"})
            c("GET", t, expect=200, path={"name": name, "version": 1}, headers={"Accept": "application/json"})
        c("GET", "/v1/models/{name}/plots/history", expect=200, path={"name": name})
        c("GET", "/v1/models/{name}/plots/history", expect=200, path={"name": name},
          headers={"Accept": "application/json"})
        row = {"station": "mill-lane", "flow_lps": 70.0, "head_m": 35.0}
        c("POST", PREDICT_LIVE, expect=200, path={"name": name}, json={"rows": [row], "interval_level": 0.9})
        c("POST", PREDICT_VERSION, expect=200, path={"name": name, "version": 2},
          json={"rows": [row, {**row, "flow_lps": 900.0, "station": "new-site"}]})
        c("POST", PREDICT_LIVE, expect=200, path={"name": name}, params={"interval_level": 0.8},
          content=table_csv({k: [v] for k, v in row.items()}), headers={"Content-Type": "text/csv"})
        c("POST", PREDICT_LIVE, expect=422, path={"name": name}, json={"rows": [{"flow_lps": 1.0}]})
        # after training: input drift of what was served, scored outcomes, their figures, and the export
        c("GET", "/v1/models/{name}/inputs", expect=200, path={"name": name})
        c("POST", "/v1/models/{name}/outcomes", expect=202, path={"name": name},
          json={"rows": [{**row, "energy_kwh": 41.0}], "version": 1})
        c("GET", "/v1/models/{name}/outcomes", expect=200, path={"name": name}, params={"version": 1, "since": "1d"})
        for kind in ("drift", "outside-range", "live-error"):
            t = "/v1/models/{name}/plots/" + kind
            c("GET", t, expect=200, path={"name": name})
            c("GET", t, expect=200, path={"name": name}, params={"format": "png"})
            c("GET", t, expect=200, path={"name": name}, headers={"Accept": "application/json"})
        for fmt in ("json", "sklearn"):
            c("GET", "/v1/models/{name}/versions/{version}/export", expect=200, path={"name": name, "version": 1},
              params={"format": fmt})
        c("PUT", "/v1/models/{name}/live", expect=200, path={"name": name},
          json={"version": 2, "reason": "tour: retrained on the next month"})
        c("PUT", "/v1/models/{name}/live", expect=200, path={"name": name},
          json={"version": 2, "reason": "tour: again"})
        c("GET", "/v1/models/{name}/history", expect=200, path={"name": name})
        c("POST", "/v1/models/{name}/prune", expect=200, path={"name": name}, json={"keep": 0, "dry_run": True})
        c("GET", "/v1/trainings/{job_id}", expect=404, path={"job_id": "no-such-job"})
        c("DELETE", "/v1/trainings/{job_id}", expect=409, path={"job_id": bad["id"]})  # already failed
        late = c("POST", "/v1/models/{name}/trainings", expect=202, path={"name": name},
                 json={"data": {"rows": rows}, "promote": "never"}, headers={"Idempotency-Key": "tour-late"})
        c("POST", "/v1/models/{name}/trainings", expect=202, path={"name": name},
          json={"data": {"rows": rows}, "promote": "never"}, headers={"Idempotency-Key": "tour-late"})
        # cancelled while queued or running, or it finished first (409): both answers are recorded
        c("DELETE", "/v1/trainings/{job_id}", expect=(200, 409), path={"job_id": late["id"]})
        self.wait(late["id"])
        c("DELETE", "/v1/models/{name}/versions/{version}", expect=204, path={"name": name, "version": 1})
        c("GET", "/metrics", expect=200)
        key = c("POST", "/v1/keys", expect=201, json={"scopes": ["admin"], "label": "tour"})
        self.http.headers["Authorization"] = f"Bearer {key['secret']}"
        other = c("POST", "/v1/keys", expect=201, json={"scopes": ["predict", "metrics"], "label": "dashboard"})
        c("GET", "/v1/keys", expect=200)
        c("DELETE", "/v1/keys/{key_id}", expect=200, path={"key_id": other["key_id"]})
        c("DELETE", "/v1/keys/{key_id}", expect=409, path={"key_id": key["key_id"]})
        return self.answers
