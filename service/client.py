"""Python client of the Tikhon HTTP API (httpx).

    from service.client import Client, ServiceError

    with Client("http://127.0.0.1:8000", key=None) as tk:
        job = tk.train("pump-energy", file="pumps.csv", spec={"target": "energy_kwh"})
        job = tk.wait(job, on_progress=lambda job: print(job["progress"]))
        answer = tk.predict("pump-energy", rows=[{"station": "mill-lane", "flow_lps": 70, "head_m": 35}],
                            interval_level=0.9)

Every method maps to one route of the OpenAPI document (``Client.routes()`` lists the mapping; a test
checks it against a live server's ``/openapi.json``). Answers are the decoded JSON bodies (plain dicts
and lists), bytes for figures, text for the metrics and CSV answers.

Exceptions (one tree; ``except ServiceError`` catches every failure of a call to the server)::

    ServiceError                  a call failed; ``status``, ``title``, ``detail`` (one line), ``type``, ...
    ├── ConnectionFailed          no answer came: nothing listens there, the name does not resolve, the
    │   │                         connection broke (``status`` 0; ``detail`` names the address and the fix)
    │   └── AnswerTimeout         the request went out but no answer came within the client timeout
    ├── ProblemAnswer             the server answered with an error status; the RFC 9457 problem members
    │   │                         (``type``, ``title``, ``status``, ``detail``, ``errors``, ``instance``,
    │   │                         ``request_id``) are attributes, the whole body is ``body``
    │   ├── ClientProblem         4xx: the request was wrong (bad input, a missing key or scope, a conflict);
    │   │                         sending it again unchanged gives the same answer (429 says when to retry)
    │   └── ServerProblem         5xx: the server failed or its catalog is unavailable; retry later
    ├── UnexpectedAnswer          a success status with a body that is not what a Tikhon server sends
    └── WaitTimeout               ``wait(timeout=...)`` gave up; the job goes on running on the server

    ValueError                    a caller's mistake found before anything is sent (a file that does not
    └── InvalidArgument           exist, two data arguments, a version that is not a whole number); it is
                                  not a ServiceError: nothing went to the server
"""

from __future__ import annotations

import json
import os
import time
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping, Sequence, TypedDict

import httpx

from service.jobstates import FINAL_STATES

__all__ = ["Client", "ServiceError", "ConnectionFailed", "AnswerTimeout", "ProblemAnswer", "ClientProblem",
           "ServerProblem", "UnexpectedAnswer", "WaitTimeout", "InvalidArgument", "FINAL_STATES", "PLOT_KINDS", "DEFAULT_URL", "Job", "Progress", "Prediction", "PredictAnswer",
           "ModelBlock", "ApiKey"]


# Shapes of the main answers, for editors and type checkers (the values are the decoded JSON; fields the
# server adds later are kept, these name the ones a caller relies on).
class Progress(TypedDict):
    done: int
    total: int | None


class Job(TypedDict, total=False):
    id: str
    model: str
    state: str  # queued | running | succeeded | failed | cancelled
    progress: Progress
    attempts: int
    created_at: str
    started_at: str | None
    finished_at: str | None
    version: int | None
    promote: str
    decision: dict[str, Any] | None  # went_live, reason, metric, new_cv_mean, live_on_new_data, ...
    problem: dict[str, Any] | None  # RFC 9457 problem of a failed job
    links: dict[str, str]


class ModelBlock(TypedDict):
    name: str
    version: int
    created_at: str
    basis: dict[str, Any]
    penalty: dict[str, Any]
    cv: dict[str, Any]


class Prediction(TypedDict, total=False):
    value: float
    interval: list[float | None]  # [lower, upper], present when an interval level was asked for
    warnings: list[str]


class PredictAnswer(TypedDict):
    model: ModelBlock
    predictions: list[Prediction]


class ApiKey(TypedDict, total=False):
    key_id: str
    scopes: list[str]
    label: str
    created_at: str
    revoked_at: str | None
    active: bool
    secret: str  # only in the answer that created the key

DEFAULT_URL = "http://127.0.0.1:8000"
PLOT_KINDS = ("cv", "path", "residuals")  # the figures of one version (the model's history is plot_history)


class ServiceError(Exception):
    """A failed call (the root of the tree in the module docstring). ``status`` is the HTTP status (0 when
    no answer came); the other attributes are the RFC 9457 problem members (``errors`` lists field-level
    problems)."""

    def __init__(self, status: int, title: str, detail: str, *, type: str = "about:blank",
                 errors: list[dict[str, Any]] | None = None, instance: str | None = None,
                 request_id: str | None = None, body: dict[str, Any] | None = None):
        self.status = status
        self.title = title
        self.detail = " ".join(str(detail).split())
        self.type = type
        self.errors = list(errors or [])
        self.instance = instance
        self.request_id = request_id
        self.body = dict(body or {})
        super().__init__(self.detail)

    def __str__(self) -> str:  # always one line
        where = f"{self.status} {self.title}" if self.status else self.title
        return f"{self.detail} ({where})"

    @staticmethod
    def from_response(response: httpx.Response) -> "ProblemAnswer":
        """The exception for an answer with an error status: ``ClientProblem`` (4xx) or ``ServerProblem``
        (5xx, and any other status), with the problem members of its body."""
        body: Any = None
        try:
            body = response.json()
        except ValueError:
            body = None
        status = response.status_code
        if isinstance(body, dict) and ("detail" in body or "title" in body):
            status = int(body.get("status") or status)
            cls = ClientProblem if 400 <= status < 500 else ServerProblem
            return cls(
                status, str(body.get("title") or response.reason_phrase),
                str(body.get("detail") or body.get("title")), type=str(body.get("type") or "about:blank"),
                errors=body.get("errors") if isinstance(body.get("errors"), list) else None,
                instance=body.get("instance"), request_id=body.get("request_id"), body=body,
            )
        text = " ".join(response.text.split())[:300]
        cls = ClientProblem if 400 <= status < 500 else ServerProblem
        return cls(status, response.reason_phrase or "Error",
                   f"{response.request.method} {response.request.url.path} answered {status} without a "
                   f"problem body: {text or '(empty)'}; check that the URL points at a Tikhon server.")


class ConnectionFailed(ServiceError):
    """No answer came from the server (``status`` 0)."""

    def __init__(self, title: str, detail: str):
        super().__init__(0, title, detail)


class AnswerTimeout(ConnectionFailed):
    """The request went out, and no answer came within the client's timeout."""


class ProblemAnswer(ServiceError):
    """The server answered with an error status and (normally) an RFC 9457 problem body."""


class ClientProblem(ProblemAnswer):
    """A 4xx answer: the request itself was wrong; retrying it unchanged will not help."""


class ServerProblem(ProblemAnswer):
    """A 5xx answer: the server failed or could not reach its catalog; a later retry may succeed."""


class UnexpectedAnswer(ServiceError):
    """A success status whose body is not what a Tikhon server sends (the URL points elsewhere)."""


class WaitTimeout(ServiceError):
    """``Client.wait`` gave up before the job ended (``status`` 0); the job is still on the server."""

    def __init__(self, detail: str):
        super().__init__(0, "Timeout", detail)


class InvalidArgument(ValueError):
    """A caller's mistake found before anything was sent; the message names the argument and the fix."""


def _route(method: str, template: str) -> Callable[[Callable], Callable]:
    """Mark a client method as the caller of one route (``Client.routes()`` collects the marks)."""

    def mark(fn: Callable) -> Callable:
        fn.__tikhon_route__ = (method, template)
        return fn

    return mark


def _window(version: int | None, since: str | None, until: str | None) -> dict[str, Any]:
    params: dict[str, Any] = {}
    if version is not None:
        params["version"] = _num(version)
    if since is not None:
        params["since"] = since
    if until is not None:
        params["until"] = until
    return params


def _rows_from_columns(columns: Mapping[str, Sequence[Any]]) -> list[dict[str, Any]]:
    names = list(columns)
    lengths = {len(columns[n]) for n in names}
    if len(lengths) > 1:
        raise InvalidArgument(f"columns have different lengths {sorted(lengths)}; give every "
                           "column the same number of values.")
    values = [list(_plain(columns[n])) for n in names]
    return [dict(zip(names, row)) for row in zip(*values)]


def _plain(seq: Sequence[Any]) -> Iterable[Any]:
    tolist = getattr(seq, "tolist", None)
    return tolist() if callable(tolist) else seq


def _one_of(what: str, **given: Any) -> tuple[str, Any]:
    present = [(k, v) for k, v in given.items() if v is not None]
    if len(present) != 1:
        names = ", ".join(given)
        got = ", ".join(k for k, _ in present) or "none"
        raise InvalidArgument(f"{what} needs exactly one of {names}; got {got}.")
    return present[0]


class Client:
    """A connection to one Tikhon server. ``key`` is an API key (``Authorization: Bearer``); leave it out
    when the server has no keys (it then listens on loopback only). ``timeout`` is per request, in
    seconds. Extra keyword arguments go to ``httpx.Client`` (``transport=``, ``verify=``, ...)."""

    def __init__(self, url: str = DEFAULT_URL, key: str | None = None, timeout: float = 60.0, **httpx_options: Any):
        self.url = str(url).rstrip("/")
        if not self.url.startswith(("http://", "https://")):
            raise InvalidArgument(f"server URL {url!r} lacks its scheme; write it as "
                               "http://host:port or https://host:port.")
        headers = {"User-Agent": "tikhon-client/1", "Accept": "application/json"}
        if key:
            headers["Authorization"] = f"Bearer {key}"
        # Failed connection attempts are retried twice: the request was never sent, so even a POST is safe.
        httpx_options.setdefault("transport", httpx.HTTPTransport(retries=2))
        self._http = httpx.Client(base_url=self.url, headers=headers, timeout=timeout, **httpx_options)

    # -- plumbing -----------------------------------------------------------------------------------
    def close(self) -> None:
        self._http.close()

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    @classmethod
    def routes(cls) -> dict[tuple[str, str], str]:
        """(HTTP method, path template) -> the method of this class that calls it."""
        found: dict[tuple[str, str], str] = {}
        for name in dir(cls):
            mark = getattr(getattr(cls, name), "__tikhon_route__", None)
            if mark is not None:
                found[mark] = name
        return found

    def _send(self, method: str, path: str, *, expect: str = "json", **kw: Any) -> Any:
        try:
            response = self._http.request(method, path, **kw)
        except httpx.TimeoutException:
            raise AnswerTimeout("Timeout", f"{method} {self.url}{path} got no answer within the client timeout; "
                                "raise the timeout (Client(timeout=...)) or check the server's load.") from None
        except httpx.TransportError as exc:
            reason = " ".join(str(exc).split()) or type(exc).__name__
            raise ConnectionFailed("Unreachable", f"cannot reach the Tikhon server at {self.url} ({reason}); start it "
                               "with 'tikhon serve' or point the client at the right address (--url / TIKHON_URL).") from None
        if response.status_code >= 400:
            raise ServiceError.from_response(response)
        if expect == "json":
            if response.status_code == 204 or not response.content:
                return None
            try:
                return response.json()
            except ValueError:
                raise UnexpectedAnswer(response.status_code, "Unexpected answer",
                                   f"{method} {path} answered with a body that is not JSON; check that {self.url} is a "
                                   "Tikhon server.") from None
        if expect == "text":
            return response.text
        if expect == "response":
            return response
        return response.content

    # -- health (open routes) -------------------------------------------------------------------------
    @_route("GET", "/healthz")
    def health(self) -> dict[str, Any]:
        """Liveness: ``{"status": "ok"}`` while the process runs."""
        return self._send("GET", "/healthz")

    @_route("GET", "/readyz")
    def ready(self) -> dict[str, Any]:
        """Readiness: the catalog answers and the store is writable. A 503 is raised as ``ServerProblem``."""
        return self._send("GET", "/readyz")

    @_route("GET", "/metrics")
    def metrics(self) -> str:
        """The Prometheus text exposition of the server's counters and histograms."""
        return self._send("GET", "/metrics", expect="text")

    @_route("GET", "/problems")
    def problem_types(self) -> dict[str, Any]:
        """Every problem type the API answers with: slug -> title and description."""
        return self._send("GET", "/problems")

    @_route("GET", "/problems/{slug}")
    def problem_type(self, slug: str) -> str:
        """The HTML page explaining one problem type (the ``type`` member of a problem points at it)."""
        return self._send("GET", f"/problems/{_seg(slug)}", expect="text")

    # -- models and versions --------------------------------------------------------------------------
    @_route("GET", "/v1/models")
    def models(self) -> list[dict[str, Any]]:
        """Every model with its live version, newest version number and count of versions."""
        return self._send("GET", "/v1/models")["models"]

    @_route("GET", "/v1/models/{name}")
    def model(self, name: str) -> dict[str, Any]:
        """One model: the live version's metadata, the version numbers and links."""
        return self._send("GET", f"/v1/models/{_seg(name)}")

    @_route("GET", "/v1/models/{name}/versions")
    def versions(self, name: str) -> list[dict[str, Any]]:
        """The existing versions of a model (catalog rows: number, checksum, live flag, CV summary)."""
        return self._send("GET", f"/v1/models/{_seg(name)}/versions")["versions"]

    @_route("GET", "/v1/models/{name}/versions/{version}")
    def version(self, name: str, version: int) -> dict[str, Any]:
        """Full metadata of one version: spec, chosen point, feature schema and ranges, checksums, libraries."""
        return self._send("GET", f"/v1/models/{_seg(name)}/versions/{_num(version)}")

    @_route("GET", "/v1/models/{name}/versions/{version}/cv")
    def cv(self, name: str, version: int, *, view: str = "all", offset: int | None = None,
           limit: int | None = None) -> dict[str, Any]:
        """The CV surface: one row per (basis setting, strength[, l1 ratio]) with fold errors, mean and std.

        ``view="best_per_basis"``: the best row of each basis setting. ``view="all"``: every row; with
        ``offset``/``limit`` one page, without them all pages, joined (the server sends at most 10,000
        rows per page)."""
        path = f"/v1/models/{_seg(name)}/versions/{_num(version)}/cv"
        if view != "all" or offset is not None or limit is not None:
            params = {"view": view, **({"offset": offset} if offset is not None else {}),
                      **({"limit": limit} if limit is not None else {})}
            return self._send("GET", path, params=params)
        out = self._send("GET", path, params={"view": "all", "offset": 0, "limit": 10_000})
        while (out.get("links") or {}).get("next"):
            page = self._send("GET", path, params={"view": "all", "offset": out["offset"] + len(out["table"]),
                                                   "limit": 10_000})
            if not page["table"]:
                break
            out["table"].extend(page["table"])
            out["links"] = page["links"]
        out["limit"] = len(out["table"])
        return out

    @_route("GET", "/v1/models/{name}/versions/{version}/path")
    def path(self, name: str, version: int) -> dict[str, Any]:
        """The regularization path (coefficients against strength) of the chosen basis setting."""
        return self._send("GET", f"/v1/models/{_seg(name)}/versions/{_num(version)}/path")

    @_route("GET", "/v1/models/{name}/versions/{version}/export")
    def export(self, name: str, version: int, format: str = "json") -> Any:
        """One version in a form that leaves the service: ``format="json"`` answers the export document (a dict:
        input scaling, basis, category levels, weights, intercept; the README shows a numpy evaluator),
        ``format="sklearn"`` the bytes of a joblib file holding a scikit-learn Pipeline. Loading a joblib file
        runs code: load only exports from your own server."""
        if format not in ("json", "sklearn"):
            raise ValueError(f"format {format!r} is not offered; use 'json' or 'sklearn'")
        path = f"/v1/models/{_seg(name)}/versions/{_num(version)}/export"
        if format == "json":
            return self._send("GET", path, params={"format": "json"})
        return self._send("GET", path, params={"format": "sklearn"}, expect="bytes")

    @_route("GET", "/v1/models/{name}/inputs")
    def inputs(self, name: str, *, version: int | None = None, since: str | None = None,
               until: str | None = None) -> dict[str, Any]:
        """Input drift of a version (default: live): recent shares of each input's training bins, PSI and
        flags, rows outside the training range. ``since``/``until``: ISO 8601 times or spans (``7d``, ``36h``)."""
        return self._send("GET", f"/v1/models/{_seg(name)}/inputs", params=_window(version, since, until))

    @_route("GET", "/v1/models/{name}/outcomes")
    def outcomes(self, name: str, *, version: int | None = None, since: str | None = None,
                 until: str | None = None) -> dict[str, Any]:
        """Real-world error of scored outcomes (RMSE, MAE, 0.9 coverage) against the CV error, overall and per hour."""
        return self._send("GET", f"/v1/models/{_seg(name)}/outcomes", params=_window(version, since, until))

    @_route("POST", "/v1/models/{name}/outcomes")
    def add_outcomes(self, name: str, rows: Sequence[Mapping[str, Any]], *, version: int | None = None) -> dict[str, Any]:
        """Score a version (default: live) on rows that carry the target's true value; answers the count accepted."""
        body: dict[str, Any] = {"rows": list(rows)}
        if version is not None:
            body["version"] = _num(version)
        return self._send("POST", f"/v1/models/{_seg(name)}/outcomes", json=body)

    @_route("PUT", "/v1/models/{name}/live")
    def set_live(self, name: str, version: int, reason: str) -> dict[str, Any]:
        """Make ``version`` the live version (admin scope); the change and ``reason`` go into the history."""
        return self._send("PUT", f"/v1/models/{_seg(name)}/live", json={"version": _num(version), "reason": reason})

    promote = set_live

    @_route("GET", "/v1/models/{name}/history")
    def history(self, name: str) -> list[dict[str, Any]]:
        """Every change of the live version, oldest first: who, when, from, to, why."""
        return self._send("GET", f"/v1/models/{_seg(name)}/history")["history"]

    @_route("DELETE", "/v1/models/{name}/versions/{version}")
    def delete_version(self, name: str, version: int) -> None:
        """Delete a version that is not live (admin scope). Its number is never reused."""
        self._send("DELETE", f"/v1/models/{_seg(name)}/versions/{_num(version)}")

    @_route("POST", "/v1/models/{name}/prune")
    def prune(self, name: str, keep: int, *, dry_run: bool = False) -> dict[str, Any]:
        """Delete every version except the live one and the newest ``keep`` (admin scope); with ``dry_run``
        only list them in ``deleted`` and delete nothing."""
        body: dict[str, Any] = {"keep": keep}
        if dry_run:
            body["dry_run"] = True
        return self._send("POST", f"/v1/models/{_seg(name)}/prune", json=body)

    # -- figures --------------------------------------------------------------------------------------
    def plot(self, name: str, version: int, kind: str, format: str = "svg") -> bytes:
        """A figure of one version: ``kind`` is ``cv``, ``path`` or ``residuals``; ``format`` svg or png."""
        methods = dict(zip(PLOT_KINDS, (self.plot_cv, self.plot_path, self.plot_residuals)))
        if kind not in methods:
            raise InvalidArgument(f"plot kind {kind!r} is not offered; use one of {sorted(methods)}.")
        return methods[kind](name, version, format=format)

    @_route("GET", "/v1/models/{name}/versions/{version}/plots/cv")
    def plot_cv(self, name: str, version: int, format: str = "svg") -> bytes:
        """Figure: CV error against penalty strength, one line per basis setting, the chosen point marked."""
        return self._send("GET", f"/v1/models/{_seg(name)}/versions/{_num(version)}/plots/cv",
                          params={"format": format}, expect="bytes")

    @_route("GET", "/v1/models/{name}/versions/{version}/plots/path")
    def plot_path(self, name: str, version: int, format: str = "svg") -> bytes:
        """Figure: the regularization path of the chosen basis setting."""
        return self._send("GET", f"/v1/models/{_seg(name)}/versions/{_num(version)}/plots/path",
                          params={"format": format}, expect="bytes")

    @_route("GET", "/v1/models/{name}/versions/{version}/plots/residuals")
    def plot_residuals(self, name: str, version: int, format: str = "svg") -> bytes:
        """Figure: out-of-fold residuals of one version."""
        return self._send("GET", f"/v1/models/{_seg(name)}/versions/{_num(version)}/plots/residuals",
                          params={"format": format}, expect="bytes")

    def plot_monitoring(self, name: str, kind: str, *, version: int | None = None, since: str | None = None,
                        until: str | None = None, format: str = "svg") -> bytes:
        """Figure since training: ``kind`` is ``drift`` (training against recent shares per input),
        ``outside-range`` (share of rows outside the training range per hour) or ``live-error`` (real error
        per hour against the CV band). ``since``/``until``: ISO 8601 times or spans (``7d``)."""
        methods = {"drift": self.plot_drift, "outside-range": self.plot_outside_range, "live-error": self.plot_live_error}
        if kind not in methods:
            raise ValueError(f"monitoring figure {kind!r} is not offered; use drift, outside-range or live-error")
        return methods[kind](name, version=version, since=since, until=until, format=format)

    @_route("GET", "/v1/models/{name}/plots/drift")
    def plot_drift(self, name: str, **kw: Any) -> bytes:
        """Figure: each input's training against recent shares, with its PSI (see ``plot_monitoring``)."""
        return self._monitoring_figure(name, "drift", **kw)

    @_route("GET", "/v1/models/{name}/plots/outside-range")
    def plot_outside_range(self, name: str, **kw: Any) -> bytes:
        """Figure: share of served rows outside the training range, per hour (see ``plot_monitoring``)."""
        return self._monitoring_figure(name, "outside-range", **kw)

    @_route("GET", "/v1/models/{name}/plots/live-error")
    def plot_live_error(self, name: str, **kw: Any) -> bytes:
        """Figure: real error of scored outcomes per hour against the CV band (see ``plot_monitoring``)."""
        return self._monitoring_figure(name, "live-error", **kw)

    def _monitoring_figure(self, name: str, kind: str, *, version: int | None = None, since: str | None = None,
                           until: str | None = None, format: str = "svg") -> bytes:
        return self._send("GET", f"/v1/models/{_seg(name)}/plots/{kind}",
                          params={**_window(version, since, until), "format": format}, expect="bytes")

    @_route("GET", "/v1/models/{name}/plots/history")
    def plot_history(self, name: str, format: str = "svg") -> bytes:
        """Figure: CV error and chosen settings of every version of a model."""
        return self._send("GET", f"/v1/models/{_seg(name)}/plots/history", params={"format": format}, expect="bytes")

    # -- training -------------------------------------------------------------------------------------
    @_route("POST", "/v1/models/{name}/trainings")
    def train(
        self, name: str, *, file: str | os.PathLike | None = None, rows: Sequence[Mapping[str, Any]] | None = None,
        columns: Mapping[str, Sequence[Any]] | None = None, csv: str | None = None, source: str | None = None,
        spec: Mapping[str, Any] | None = None, promote: str = "if_better", min_improvement: float = 0.0,
        idempotency_key: str | None = None, continue_from: int | None = None, old_weight: float | None = None,
    ) -> Job:
        """Submit a training job and return it (state ``queued``). Give the data as exactly one of:

        * ``file``: a local CSV or Parquet file, uploaded;
        * ``rows`` (list of dicts) or ``columns`` (dict of equal-length sequences);
        * ``csv``: CSV text;
        * ``source``: a path relative to the server's data folder (TIKHON_DATA_DIR).

        ``spec`` omitted: the live version's spec is reused (a scheduled retrain). ``promote`` is
        ``if_better`` (default), ``always`` or ``never``. A repeated call with the same
        ``idempotency_key`` returns the first job instead of starting another. ``continue_from``: a version
        of the same model to continue (the data then holds only the new rows, and ``spec`` stays out);
        ``old_weight`` (0 < w <= 1) multiplies the weight of every earlier row."""
        kind, value = _one_of("train()", file=file, rows=rows, columns=columns, csv=csv, source=source)
        headers = {"Idempotency-Key": idempotency_key} if idempotency_key else {}
        url = f"/v1/models/{_seg(name)}/trainings"
        if kind == "file":
            path = Path(value)
            if not path.is_file():
                raise InvalidArgument(f"training data file {str(path)!r} does not exist; give the "
                                   "path of a CSV or Parquet file.")
            fields: dict[str, str] = {"promote": promote, "min_improvement": repr(float(min_improvement))}
            if spec is not None:
                fields["spec"] = json.dumps(spec)
            if continue_from is not None:
                fields["continue_from"] = str(int(continue_from))
            if old_weight is not None:
                fields["old_weight"] = repr(float(old_weight))
            with open(path, "rb") as fh:
                return self._send("POST", url, data=fields, files={"file": (path.name, fh)}, headers=headers)
        data: dict[str, Any]
        if kind == "rows":
            data = {"rows": [dict(r) for r in value]}
        elif kind == "columns":
            data = {"rows": _rows_from_columns(value)}
        else:
            data = {kind: value}
        body: dict[str, Any] = {"data": data, "promote": promote, "min_improvement": float(min_improvement)}
        if spec is not None:
            body["spec"] = dict(spec)
        if continue_from is not None:
            body["continue_from"] = int(continue_from)
        if old_weight is not None:
            body["old_weight"] = float(old_weight)
        return self._send("POST", url, json=body, headers=headers)

    submit = train

    @_route("GET", "/v1/trainings/{job_id}")
    def training(self, job_id: str | Mapping[str, Any]) -> Job:
        """One training job: state, progress (done/total units), version, decision, problem."""
        return self._send("GET", f"/v1/trainings/{_seg(_job_id(job_id))}")

    @_route("GET", "/v1/trainings")
    def trainings(self, model: str | None = None) -> list[Job]:
        """Training jobs, newest first; ``model`` keeps only one model's jobs."""
        params = {"model": model} if model is not None else None
        return self._send("GET", "/v1/trainings", params=params)["trainings"]

    @_route("DELETE", "/v1/trainings/{job_id}")
    def cancel(self, job_id: str | Mapping[str, Any]) -> Job:
        """Cancel a queued or running job (a finished job gives a 409 ``ClientProblem``)."""
        return self._send("DELETE", f"/v1/trainings/{_seg(_job_id(job_id))}")

    def wait(self, job: str | Mapping[str, Any], on_progress: Callable[[Job], None] | None = None, *,
             poll: float = 0.5, timeout: float | None = None) -> Job:
        """Poll a job until it is ``succeeded``, ``failed`` or ``cancelled`` and return its final state.

        ``on_progress(job)`` is called with every polled state (including the last). A failed job is
        returned, not raised: look at ``job["state"]`` and ``job["problem"]``. ``timeout`` (seconds,
        default none) bounds the wait; when it passes, ``WaitTimeout`` says so and the
        job keeps running on the server."""
        jid = _job_id(job)
        end = None if timeout is None else time.monotonic() + timeout
        delay = min(0.1, poll)
        while True:
            state = self.training(jid)
            if on_progress is not None:
                on_progress(state)
            if state.get("state") in FINAL_STATES:
                return state
            if end is not None and time.monotonic() > end:
                raise WaitTimeout(f"training job {jid} did not end within {timeout:g} s (state "
                                  f"{state.get('state')}); wait again later, or cancel it with cancel({jid!r}).")
            time.sleep(delay)
            delay = min(poll, delay * 1.5)

    # -- predictions ----------------------------------------------------------------------------------
    @_route("POST", "/v1/models/{name}/predictions")
    def predict(
        self, name: str, *, rows: Sequence[Mapping[str, Any]] | None = None,
        columns: Mapping[str, Sequence[Any]] | None = None, csv: str | None = None,
        file: str | os.PathLike | None = None, interval_level: float | None = None, version: int | None = None,
        as_csv: bool = False,
    ) -> PredictAnswer | str:
        """Predict with the live version (or with ``version`` pinned). Inputs: exactly one of ``rows``,
        ``columns``, ``csv`` text or a CSV/JSON ``file``. ``interval_level`` (e.g. 0.9) adds CV+ intervals.

        Returns the JSON answer ``{"model": {name, version, ...}, "predictions": [{value, interval,
        warnings}, ...]}``, or, with ``as_csv=True``, the CSV text ``value[,lower,upper],warnings``."""
        if version is not None:
            return self.predict_version(name, version, rows=rows, columns=columns, csv=csv, file=file,
                                        interval_level=interval_level, as_csv=as_csv)
        return self._predict(f"/v1/models/{_seg(name)}/predictions", rows, columns, csv, file, interval_level, as_csv)

    @_route("POST", "/v1/models/{name}/versions/{version}/predictions")
    def predict_version(
        self, name: str, version: int, *, rows: Sequence[Mapping[str, Any]] | None = None,
        columns: Mapping[str, Sequence[Any]] | None = None, csv: str | None = None,
        file: str | os.PathLike | None = None, interval_level: float | None = None, as_csv: bool = False,
    ) -> PredictAnswer | str:
        """Predict with one pinned version (see ``predict``)."""
        return self._predict(f"/v1/models/{_seg(name)}/versions/{_num(version)}/predictions",
                             rows, columns, csv, file, interval_level, as_csv)

    def _predict(self, url: str, rows, columns, csv, file, interval_level, as_csv) -> PredictAnswer | str:
        kind, value = _one_of("predict()", rows=rows, columns=columns, csv=csv, file=file)
        if kind == "file":
            kind, value = _read_input_file(Path(value))
        accept = "text/csv" if as_csv else "application/json"
        if kind == "csv":
            params = {"interval_level": interval_level} if interval_level is not None else None
            response = self._send("POST", url, content=value.encode("utf-8"), params=params, expect="response",
                                  headers={"Content-Type": "text/csv", "Accept": accept})
        else:
            data = [dict(r) for r in value] if kind == "rows" else _rows_from_columns(value)
            body: dict[str, Any] = {"rows": data}
            if interval_level is not None:
                body["interval_level"] = interval_level
            response = self._send("POST", url, json=body, expect="response", headers={"Accept": accept})
        return response.text if as_csv else response.json()

    # -- API keys -------------------------------------------------------------------------------------
    @_route("GET", "/v1/keys")
    def keys(self) -> list[ApiKey]:
        """Every API key (id, scopes, label, created, revoked); secrets are never listed."""
        return self._send("GET", "/v1/keys")["keys"]

    @_route("POST", "/v1/keys")
    def create_key(self, scopes: str | Iterable[str], label: str = "") -> ApiKey:
        """Make an API key (admin scope). The answer's ``secret`` is shown only this once."""
        scopes = [scopes] if isinstance(scopes, str) else list(scopes)
        return self._send("POST", "/v1/keys", json={"scopes": scopes, "label": label})

    @_route("DELETE", "/v1/keys/{key_id}")
    def revoke_key(self, key_id: str) -> ApiKey:
        """Revoke an API key (idempotent); it stops working at once on this server, within
        TIKHON_AUTH_CACHE_S on the others."""
        return self._send("DELETE", f"/v1/keys/{_seg(key_id)}")


def _seg(value: Any) -> str:
    """One path segment, percent-encoded so a stray '/' or '?' cannot change the route."""
    from urllib.parse import quote

    return quote(str(value), safe="")


def _num(version: Any) -> int:
    """A version number: a whole number >= 1 (an int, or a string of digits such as "3")."""
    text = str(version).strip()
    if isinstance(version, bool) or not text.isdigit() or int(text) < 1:
        raise InvalidArgument(f"version must be a whole number >= 1, got {version!r}.")
    return int(text)


def _job_id(job: str | Mapping[str, Any]) -> str:
    if isinstance(job, Mapping):
        if "id" not in job:
            raise InvalidArgument("the job mapping has no 'id'; pass the dict that train() "
                               "returned or the job id string.")
        return str(job["id"])
    return str(job)


def _read_input_file(path: Path) -> tuple[str, Any]:
    """A local input file for predict: CSV text, or JSON (a list of rows or {"rows": [...]})."""
    if not path.is_file():
        raise InvalidArgument(f"input file {str(path)!r} does not exist; give a CSV or JSON file.")
    text = path.read_text(encoding="utf-8")
    if path.suffix.lower() == ".json" or text.lstrip()[:1] in ("[", "{"):
        try:
            doc = json.loads(text)
        except ValueError as exc:
            raise InvalidArgument(f"input file {str(path)!r} is not valid JSON ({exc}); give a list "
                               "of rows or {\"rows\": [...]}.") from None
        rows = doc.get("rows") if isinstance(doc, dict) else doc
        if not isinstance(rows, list):
            raise InvalidArgument(f"input file {str(path)!r} holds no list of rows; give a list of "
                               "objects or {\"rows\": [...]}.")
        return "rows", rows
    return "csv", text
