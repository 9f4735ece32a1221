"""The ``tikhon`` command line (typer + rich).

Every command except ``serve`` and ``worker`` talks to a server through ``service.client.Client``
(``--url`` / ``TIKHON_URL``, ``--key`` / ``TIKHON_KEY``). ``serve`` and ``worker`` start the service
itself; ``keys create --local`` writes the first key straight into the catalog when no server can be
reached yet (the bootstrap of a server that must listen beyond loopback), and ``keys revoke --local``
revokes a key there (the only way to revoke the last admin key).

Exit codes (``EXIT_CODES``, also printed by ``tikhon --help``): 0 ok; 1 the operation failed (a training
job failed or was cancelled, the server could not be reached or answered 5xx); 2 bad usage (a wrong
option or argument, or a 4xx answer: the request must change); 3 a training job succeeded but its
version was not made live (``--promote if_better`` found it no better, or the live version changed
after submission; ``train --wait`` and ``job --wait``); 130 interrupted. Every error is one line on
stderr; ``--json`` prints machine-readable results on stdout.
"""

from __future__ import annotations

import json
import math
import os
import sys
import threading
import time
from pathlib import Path
from typing import Annotated, Any, Optional

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from service.client import DEFAULT_URL, FINAL_STATES, PLOT_KINDS, Client, ClientProblem, InvalidArgument, ServiceError

DEMO_MODEL = "pump-energy"
DEMO_DIR = "demo"  # under TIKHON_DATA_DIR
DEMO_FILES = {0: "pump-stations.csv", 1: "pump-stations-next-month.csv"}
DEMO_ROWS = 3000
DEMO_SEED = 0

EXIT_CODES = {
    0: "ok",
    1: "failed: a training job failed or was cancelled, or the server could not be reached or answered 5xx",
    2: "bad usage: a wrong option or argument, or the server refused the request (4xx)",
    3: "trained, not made live: the job succeeded but its version did not go live (train/job --wait)",
    130: "interrupted",
}

app = typer.Typer(name="tikhon", add_completion=False, no_args_is_help=True, pretty_exceptions_enable=False,
                  rich_markup_mode=None, help="Tune, version and serve regularized regression models.",
                  epilog="Exit codes: " + "; ".join(f"{k} {v}" for k, v in EXIT_CODES.items()) + ".")
keys_app = typer.Typer(no_args_is_help=True, help="API keys: create, list, revoke (admin scope).")
app.add_typer(keys_app, name="keys")
store_app = typer.Typer(no_args_is_help=True, help="The local store folder: recover a lost catalog.")
app.add_typer(store_app, name="store")


class UsageProblem(Exception):
    """A command-line mistake found before anything was sent; exit code 2."""


class JobFailed(Exception):
    """A training job ended failed or cancelled; exit code 1."""


class TrainedNotLive(Exception):
    """A training job succeeded but its version was not made live; exit code 3."""


class _Options:
    url: str = DEFAULT_URL
    key: str | None = None
    json: bool = False
    timeout: float = 60.0


def _opts(ctx: typer.Context) -> _Options:
    obj = ctx.find_root().obj
    return obj if isinstance(obj, _Options) else _Options()


def _client(ctx: typer.Context) -> Client:
    o = _opts(ctx)
    return Client(o.url, key=o.key, timeout=o.timeout)


# On a terminal rich fits tables to its width; into a pipe or a log file they may be as wide as they need
# (up to 200 columns) instead of being cut at rich's default of 80.
_out = Console(highlight=False, soft_wrap=True, width=None if sys.stdout.isatty() else 200)
_err = Console(stderr=True, highlight=False, soft_wrap=True, width=None if sys.stderr.isatty() else 200)


def _print_json(value: Any) -> None:
    sys.stdout.write(json.dumps(value, indent=2, ensure_ascii=False) + "\n")


def _print_version(wanted: bool) -> None:
    if not wanted:
        return
    from importlib.metadata import PackageNotFoundError
    from importlib.metadata import version as dist_version

    try:
        sys.stdout.write(f"tikhon {dist_version('tikhon')}\n")
    except PackageNotFoundError:
        sys.stdout.write("tikhon (not installed as a package)\n")
    raise typer.Exit(0)


@app.callback()
def _root(
    ctx: typer.Context,
    url: Annotated[Optional[str], typer.Option("--url", envvar="TIKHON_URL", show_default=False,
                   help="Server address [default: http://127.0.0.1:$TIKHON_PORT, port 8000].")] = None,
    key: Annotated[Optional[str], typer.Option("--key", envvar="TIKHON_KEY", show_default=False,
                   help="API key (needed once the server has keys).")] = None,
    json_output: Annotated[bool, typer.Option("--json", help="Print machine-readable JSON on stdout.")] = False,
    timeout: Annotated[float, typer.Option("--timeout", min=0.1, help="Seconds to wait for each answer.")] = 60.0,
    version: Annotated[bool, typer.Option("--version", is_eager=True, callback=lambda v: _print_version(v),
                                          help="Print the version and exit.")] = False,
) -> None:
    o = _Options()
    port = os.environ.get("TIKHON_PORT", "").strip()
    o.url = url or (f"http://127.0.0.1:{port}" if port.isdigit() else DEFAULT_URL)
    o.key = key or None
    o.json = json_output
    o.timeout = timeout
    ctx.obj = o


# ----------------------------------------------------------------------------------------------------
# serve, worker (start the service itself)


def _settings(**overrides: Any):
    from pydantic import ValidationError

    from service.settings import Settings

    try:
        return Settings(**{k: v for k, v in overrides.items() if v is not None})
    except ValidationError as exc:
        e = exc.errors(include_url=False)[0]
        field = ".".join(str(p) for p in e["loc"])
        raise UsageProblem(f"setting {field} (TIKHON_{field.upper()}) is invalid: {e['msg']}; fix the option or "
                           "the environment variable.") from None


@app.command()
def serve(
    ctx: typer.Context,
    demo: Annotated[bool, typer.Option("--demo", help=f"On first start (no model in the store), train the demo model "
                                       f"'{DEMO_MODEL}' on invented pump-station data and write next month's data "
                                       f"to $TIKHON_DATA_DIR/{DEMO_DIR}/.")] = False,
    host: Annotated[Optional[str], typer.Option(help="Address to listen on [default: $TIKHON_HOST or 127.0.0.1].")] = None,
    port: Annotated[Optional[int], typer.Option(help="Port [default: $TIKHON_PORT or 8000].", min=1, max=65535)] = None,
    no_worker: Annotated[bool, typer.Option("--no-worker", help="Do not run a training worker in this process "
                                            "(run 'tikhon worker' separately).")] = False,
    workers: Annotated[Optional[str], typer.Option(
        "--workers", help="API processes sharing the port under one supervisor, or 'auto' for one per core "
        "[default: $TIKHON_WORKERS or 1]. One of them runs the training worker.")] = None,
) -> None:
    """Start the HTTP API (and, unless --no-worker, a training worker in the same process)."""
    settings = _settings(host=host, port=port, embedded_worker=False if no_worker else None, workers=workers)
    if demo:
        _seed_demo(settings, _opts(ctx).key)
    from service.api.server import process_count, run

    count = process_count(settings.workers)
    processes = f", {count} processes" if count > 1 else ""
    _err.print(f"tikhon: serving on http://{settings.host}:{settings.port} (store {settings.store}{processes}); "
               "Ctrl-C stops.")
    run(settings)


@app.command()
def worker() -> None:
    """Run a training worker (claims queued jobs from the catalog) until SIGTERM or Ctrl-C."""
    settings = _settings()
    from service.worker import run_worker

    run_worker(settings)


def demo_paths(data_dir: Path) -> dict[int, Path]:
    """Where ``serve --demo`` writes the demo data: month 0 (training) and month 1 (next month)."""
    return {month: Path(data_dir) / DEMO_DIR / name for month, name in DEMO_FILES.items()}


def _write_demo_csv(path: Path, month: int) -> None:
    """The pump-station scenario as CSV; written to a temporary name and renamed, so never half-written."""
    import csv as _csv

    from service.demo import pump_stations

    cols = pump_stations(DEMO_ROWS, seed=DEMO_SEED, month=month)
    names = list(cols)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".part")
    with open(tmp, "w", newline="", encoding="utf-8") as fh:
        w = _csv.writer(fh, lineterminator="\n")
        w.writerow(names)
        values = [cols[n].tolist() for n in names]
        w.writerows(zip(*values))
    os.replace(tmp, path)


def _seed_demo(settings, key: str | None) -> None:
    """First start with --demo: write the demo data and train the demo model through the normal job path
    (the training route accepts the job, a worker runs it), before the server starts listening."""
    from service.demo import DEMO_SPEC

    paths = demo_paths(settings.data_dir)
    for month, path in paths.items():
        if not path.is_file():
            _write_demo_csv(path, month)
    from service.api.server import build
    from service.worker import Worker

    app_, store, _ = build(settings, embedded_worker=False)
    try:
        if store.list_models():
            _err.print(f"tikhon: demo: the store already holds models; '{DEMO_MODEL}' is not trained again.")
            return
        pending = [j for j in store.jobs.list(name=DEMO_MODEL) if j["state"] in ("queued", "running")]
        if pending:
            job_id = pending[0]["id"]
        else:
            job_id = _submit_in_process(app_, key, {
                "data": {"source": f"{DEMO_DIR}/{DEMO_FILES[0]}"}, "spec": DEMO_SPEC, "promote": "always"})
        _err.print(f"tikhon: demo: training '{DEMO_MODEL}' on {DEMO_ROWS} invented hourly pump-station readings "
                   "(first start only)...")
        w = Worker(settings, store)
        runner = threading.Thread(target=_run_until, args=(w, store, job_id), daemon=True)
        runner.start()
        job = _follow(lambda: _job_in_process(app_, key, job_id), f"demo {DEMO_MODEL}", poll=0.2)
        runner.join()
        if job["state"] != "succeeded":
            raise JobFailed(f"demo training job {job_id} {job['state']}: {_problem_text(job)}")
        decision = job.get("decision") or {}
        _err.print(f"tikhon: demo: '{DEMO_MODEL}' version {job['version']} is live "
                   f"({cv_label(decision.get('metric', 'rmse'))} {decision.get('new_cv_mean', float('nan')):.4g}); "
                   f"next month's data for a scheduled retrain: {paths[1]}")
    finally:
        store.close()


def _in_process(app_, key: str | None, method: str, path: str, body: dict | None = None):
    """Send one request to the app's own route, in-process (the same checks and views as over HTTP)."""
    import anyio
    import httpx

    async def send() -> httpx.Response:
        headers = {"Authorization": f"Bearer {key}"} if key else {}
        transport = httpx.ASGITransport(app=app_, client=("127.0.0.1", 0))
        async with httpx.AsyncClient(transport=transport, base_url="http://127.0.0.1") as c:
            return await c.request(method, path, json=body, headers=headers, timeout=120)

    return anyio.run(send)


def _submit_in_process(app_, key: str | None, body: dict) -> str:
    """POST the training request to the app's own route, in-process."""
    response = _in_process(app_, key, "POST", f"/v1/models/{DEMO_MODEL}/trainings", body)
    if response.status_code != 202:
        err = ServiceError.from_response(response)
        raise JobFailed(f"the demo training was refused: {err}" + (
            "; the store has API keys, so pass one with the train scope (--key / TIKHON_KEY)" if err.status == 401 else ""))
    return response.json()["id"]


def _job_in_process(app_, key: str | None, job_id: str) -> dict:
    """The job as GET /v1/trainings/{id} shows it, read through the app's own route."""
    response = _in_process(app_, key, "GET", f"/v1/trainings/{job_id}")
    if response.status_code != 200:
        raise JobFailed(f"the demo training job {job_id} could not be read: {ServiceError.from_response(response)}")
    return response.json()


def _run_until(w, store, job_id: str) -> None:
    while store.jobs.get(job_id)["state"] not in FINAL_STATES:
        if not w.run_once():
            time.sleep(0.2)


# ----------------------------------------------------------------------------------------------------
# training


def parse_basis(text: str) -> dict[str, Any]:
    """``linear``, ``poly:1-6``, ``poly:2,3,5``, ``rbf:0.5,1,2`` or ``rbf:0.5,1,2:60`` (60 centres)."""
    raw = text.strip()
    kind, _, rest = raw.partition(":")
    kind = kind.strip().lower()
    hint = "use linear, poly:1-6, poly:2,3 or rbf:0.5,1,2 (widths) with an optional :CENTERS, e.g. rbf:0.5,1,2:60"
    if kind == "linear" and not rest:
        return {"kind": "linear"}
    if kind in ("poly", "polynomial") and rest:
        try:
            if "-" in rest:
                lo, hi = (int(p) for p in rest.split("-", 1))
                degrees = list(range(lo, hi + 1))
            else:
                degrees = [int(p) for p in rest.split(",") if p.strip()]
        except ValueError:
            raise UsageProblem(f"--basis {raw!r}: degrees must be whole numbers; {hint}.") from None
        if not degrees:
            raise UsageProblem(f"--basis {raw!r} names no degree; {hint}.")
        return {"kind": "polynomial", "degrees": degrees}
    if kind == "rbf" and rest:
        widths_text, _, centers = rest.partition(":")
        try:
            widths = [float(p) for p in widths_text.split(",") if p.strip()]
            out: dict[str, Any] = {"kind": "rbf", "widths": widths}
            if centers:
                out["centers"] = int(centers)
        except ValueError:
            raise UsageProblem(f"--basis {raw!r}: widths must be numbers and centres a whole number; {hint}.") from None
        return out
    raise UsageProblem(f"--basis {raw!r} is not understood; {hint}.")


def _load_spec(path: Path) -> dict[str, Any]:
    try:
        spec = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise UsageProblem(f"--spec {str(path)!r} does not exist; give the path of a JSON training spec.") from None
    except (ValueError, UnicodeDecodeError) as exc:
        raise UsageProblem(f"--spec {str(path)!r} is not valid JSON ({' '.join(str(exc).split())}); fix the file.") from None
    if not isinstance(spec, dict):
        raise UsageProblem(f"--spec {str(path)!r} holds a {type(spec).__name__}; a spec is a JSON object such as "
                           "{\"target\": \"energy_kwh\"}.")
    return spec


@app.command()
def train(
    ctx: typer.Context,
    name: Annotated[str, typer.Argument(help="Model name.")],
    data: Annotated[Optional[Path], typer.Option("--data", help="CSV or Parquet file to train on (uploaded).")] = None,
    source: Annotated[Optional[str], typer.Option("--source", help="Instead of --data: a CSV or Parquet file (or "
                                                  "folder) already on the server, relative to its TIKHON_DATA_DIR; "
                                                  "for tables too large to upload.")] = None,
    target: Annotated[Optional[str], typer.Option(help="Target column (overrides the spec's).")] = None,
    spec: Annotated[Optional[Path], typer.Option(help="JSON training spec. With neither --spec nor --target the live "
                                                 "version's spec is reused (a scheduled retrain).")] = None,
    basis: Annotated[Optional[list[str]], typer.Option(help="Basis to try, repeatable: linear, poly:1-6, rbf:0.5,1,2 "
                                                       "(replaces the spec's bases).")] = None,
    feature: Annotated[Optional[list[str]], typer.Option(help="Numeric input column, repeatable (default: all).")] = None,
    categorical: Annotated[Optional[list[str]], typer.Option(help="Categorical input column, repeatable.")] = None,
    promote: Annotated[str, typer.Option(help="always | if_better | never.")] = "if_better",
    min_improvement: Annotated[float, typer.Option(min=0.0, help="For if_better: least improvement of the CV "
                                                   "metric needed.")] = 0.0,
    wait: Annotated[bool, typer.Option("--wait", help="Show progress until the job ends, then a summary.")] = False,
    idempotency_key: Annotated[Optional[str], typer.Option(help="Repeat-safe submission key (e.g. a date for a "
                                                           "nightly job).")] = None,
    continue_from: Annotated[Optional[int], typer.Option("--continue-from", min=1, help="Continue this version of "
                                                         "the model: --data holds only the NEW rows, merged into its "
                                                         "per-fold summaries (its spec and basis are kept).")] = None,
    old_weight: Annotated[Optional[float], typer.Option("--old-weight", help="With --continue-from: weight of "
                                                        "every earlier row, in (0, 1] (default 1).")] = None,
) -> None:
    """Submit a training job; with --wait, follow it and summarize the chosen point and the CV curve."""
    if old_weight is not None and continue_from is None:
        raise UsageProblem("--old-weight applies to a continued training; give --continue-from VERSION too.")
    if old_weight is not None and not (0 < old_weight <= 1):
        raise UsageProblem(f"--old-weight {old_weight:g} is outside (0, 1]; e.g. 0.8 weighs earlier rows 0.8 times "
                           "as much as the new ones.")
    if continue_from is not None and (spec or target or basis or feature or categorical):
        raise UsageProblem("--continue-from keeps the continued version's spec; leave out --spec, --target, --basis, "
                           "--feature and --categorical.")
    if promote not in ("always", "if_better", "never"):
        raise UsageProblem(f"--promote {promote!r} is not offered; use always, if_better or never.")
    if (data is None) == (source is None):
        raise UsageProblem("give the training table with exactly one of --data FILE (uploaded) or --source PATH "
                           "(a file in the server's TIKHON_DATA_DIR).")
    if data is not None and not data.is_file():
        raise UsageProblem(f"--data {str(data)!r} is not a file; give the path of a CSV or Parquet table.")
    body: dict[str, Any] | None = _load_spec(spec) if spec is not None else None
    if body is None and (target or basis or feature or categorical):
        if not target:
            raise UsageProblem("--basis/--feature/--categorical need --target or --spec (without them the live "
                               "version's spec is reused unchanged).")
        body = {}
    if body is not None:
        if target:
            body["target"] = target
        if basis:
            body["bases"] = [parse_basis(b) for b in basis]
        if feature:
            body["features"] = list(feature)
        if categorical:
            body["categorical"] = list(categorical)
    o = _opts(ctx)
    with _client(ctx) as tk:
        job = tk.train(name, file=data, source=source, spec=body, promote=promote, min_improvement=min_improvement,
                       idempotency_key=idempotency_key, continue_from=continue_from, old_weight=old_weight)
        if not wait:
            if o.json:
                _print_json(job)
            else:
                _out.print(f"job {job['id']} {job['state']} ({name}); follow it with: tikhon job {job['id']} --wait")
            return
        final = _follow(lambda: tk.training(job["id"]), f"training {name}", poll=0.25)
        _finish_job(tk, final, o)


@app.command("job")
def job_cmd(
    ctx: typer.Context,
    job_id: Annotated[str, typer.Argument(help="Training job id.")],
    wait: Annotated[bool, typer.Option("--wait", help="Follow the job until it ends.")] = False,
) -> None:
    """Show a training job (with --wait: follow it, then summarize like 'train --wait')."""
    o = _opts(ctx)
    with _client(ctx) as tk:
        job = tk.training(job_id)
        if wait and job["state"] not in FINAL_STATES:
            job = _follow(lambda: tk.training(job_id), f"training {job['model']}", poll=0.25)
        if job["state"] in FINAL_STATES:
            _finish_job(tk, job, o)
            return
        if o.json:
            _print_json(job)
        else:
            p = job.get("progress") or {}
            _out.print(f"job {job['id']} {job['state']} ({job['model']}): {p.get('done', 0)}/{p.get('total') or '?'} units")


@app.command()
def jobs(
    ctx: typer.Context,
    name: Annotated[Optional[str], typer.Argument(help="Only this model's jobs.")] = None,
) -> None:
    """List training jobs, newest first."""
    with _client(ctx) as tk:
        items = tk.trainings(model=name)
    if _opts(ctx).json:
        _print_json(items)
        return
    t = Table(box=None, pad_edge=False)
    t.add_column("job", no_wrap=True, min_width=32)  # full ids: they are copied into 'tikhon job' and 'cancel'
    for title in ("model", "state", "progress", "version", "created (UTC)"):
        t.add_column(title, no_wrap=True)
    t.add_column("decision")
    for j in items:
        p = j.get("progress") or {}
        t.add_row(j["id"], j["model"], j["state"], f"{p.get('done', 0)}/{p.get('total') or '?'}",
                  str(j.get("version") or ""), str(j.get("created_at") or "")[5:16].replace("T", " "),
                  _decision_text(j.get("decision")))
    _out.print(t)


def _decision_text(decision: dict | None) -> str:
    """``went live: <why>`` or ``not live: <why>`` for a finished job's decision; empty before it ends."""
    if not isinstance(decision, dict) or "went_live" not in decision:
        return ""
    why = " ".join(str(decision.get("reason") or "").split())
    return ("went live" if decision.get("went_live") else "not live") + (f": {why}" if why else "")


@app.command()
def cancel(ctx: typer.Context, job_id: Annotated[str, typer.Argument(help="Training job id.")]) -> None:
    """Cancel a queued or running training job."""
    with _client(ctx) as tk:
        job = tk.cancel(job_id)
    if _opts(ctx).json:
        _print_json(job)
    else:
        _out.print(f"job {job['id']} {job['state']}")


def _follow(fetch, label: str, *, poll: float) -> dict[str, Any]:
    """Poll a job until it ends, with a live progress bar on a terminal (plain lines otherwise)."""
    interactive = _err.is_terminal
    last_line = 0.0
    delay = 0.05
    with Progress(TextColumn("{task.description}"), BarColumn(bar_width=40), MofNCompleteColumn(),
                  TextColumn("units"), TimeElapsedColumn(), console=_err, transient=False,
                  disable=not interactive) as bar:
        task = bar.add_task(label, total=None)
        while True:
            job = fetch()
            p = job.get("progress") or {}
            done, total = int(p.get("done") or 0), p.get("total")
            bar.update(task, completed=done, total=total, description=f"{label} [{job['state']}]")
            now = time.monotonic()
            if not interactive and now - last_line >= 5.0:
                last_line = now
                _err.print(f"tikhon: {label}: {job['state']} {done}/{total or '?'} units")
            if job["state"] in FINAL_STATES:
                if total:
                    bar.update(task, completed=done)
                return job
            time.sleep(delay)
            delay = min(poll, delay * 1.5)


def _problem_text(job: dict) -> str:
    problem = job.get("problem") or {}
    text = problem.get("detail") or problem.get("title") or f"the job ended {job.get('state')}"
    return " ".join(str(text).split())


def _finish_job(tk: Client, job: dict, o: _Options) -> None:
    if job["state"] != "succeeded":
        if o.json:
            _print_json(job)
        raise JobFailed(f"training job {job['id']} of {job['model']} {job['state']}: {_problem_text(job)}")
    name, version = job["model"], job["version"]
    meta = tk.version(name, version)
    cv = tk.cv(name, version)
    if o.json:
        _print_json({"job": job, "chosen": meta.get("chosen"), "cv_summary": meta.get("cv_summary"),
                     "warnings": meta.get("warnings") or [], **({"lineage": meta["lineage"]} if meta.get("lineage") else {})})
    else:
        _out.print(summary_table(job, meta))
        lineage = meta.get("lineage") or {}
        if lineage.get("parent_version") is not None:
            _out.print(f"continued from version {lineage['parent_version']}: {lineage.get('new_rows')} new rows "
                       f"merged ({lineage.get('rows')} in all), earlier rows weighted {lineage.get('old_weight'):g}")
        _out.print(cv_text_plot(cv.get("table") or [], meta.get("chosen") or {}))
        _print_warnings(meta)
    decision = job.get("decision") or {}
    if decision.get("went_live") is False and decision.get("promote") != "never":
        raise TrainedNotLive(f"version {version} of {name} was trained but not made live: {decision.get('reason')}")


def _print_warnings(meta: dict) -> None:
    """The version's warnings (edge of the grid, little data, unused columns), one line each."""
    for w in meta.get("warnings") or []:
        _out.print(f"warning: {' '.join(str(w).split())}")


def _pm_text(chosen: dict, splits: Any) -> str:
    """``mean ± SE (1 SE over K folds)``: the one meaning of ± everywhere (pages, figures, CLI) is the
    one-standard-error rule's standard error over the CV splits: the engine's ``se`` (sample standard
    deviation over √splits), or std/√splits for versions trained before ``se`` was stored."""
    mean = chosen.get("mean")
    std = chosen.get("std")
    se = chosen.get("se")
    if not isinstance(mean, (int, float)):
        return "-"
    text = f"{mean:.6g}"
    try:
        k = int(splits)
    except (TypeError, ValueError):
        return text
    if isinstance(se, (int, float)) and k >= 1:
        text += f" ± {se:.3g} (1 SE over {k} folds)"
    elif isinstance(std, (int, float)) and k >= 1:
        text += f" ± {std / math.sqrt(k):.3g} (1 SE over {k} folds)"
    return text


def _basis_text(basis: dict | None) -> str:
    basis = basis or {}
    kind = basis.get("kind", "?")
    if kind == "polynomial":
        return f"polynomial, degree {basis.get('degree')}"
    if kind == "rbf":
        extra = f", {basis['centers']} centres" if basis.get("centers") else ""
        return f"rbf, width {basis.get('width'):g}{extra}" if basis.get("width") is not None else "rbf"
    return str(kind)


def _penalty_text(penalty: dict | None) -> str:
    penalty = penalty or {}
    s = penalty.get("strength")
    text = f"{penalty.get('kind', '?')}, λ = {s:.4g}" if isinstance(s, (int, float)) else str(penalty.get("kind"))
    if penalty.get("l1_ratio") is not None:
        text += f", l1_ratio {penalty['l1_ratio']:g}"
    return text


def cv_label(metric: str | None) -> str:
    """The one label of a cross-validated error, as the pages and figures write it: ``CV RMSE``."""
    return f"CV {metric.upper()}" if metric else "CV error"


def summary_table(job: dict, meta: dict) -> Table:
    chosen = meta.get("chosen") or {}
    summary = meta.get("cv_summary") or {}
    decision = job.get("decision") or {}
    t = Table(title=f"{job['model']} version {job['version']}", show_header=False)
    t.add_column("what", style="bold")
    t.add_column("value")
    t.add_row("chosen basis", _basis_text(chosen.get("basis")))
    t.add_row("chosen penalty", _penalty_text(chosen.get("penalty")))
    metric = chosen.get("metric") or summary.get("metric") or "rmse"
    folds = summary.get("splits")
    t.add_row(cv_label(metric), _pm_text(chosen, folds))
    t.add_row("selection rule", str(chosen.get("rule") or summary.get("rule")))
    t.add_row("candidates", f"{summary.get('candidates')} ({summary.get('basis_settings')} basis settings × "
              f"{summary.get('strengths')} strengths), {summary.get('rows')} rows")
    went = decision.get("went_live")
    t.add_row("live", ("yes" if went else "no") + (f": {decision.get('reason')}" if decision.get("reason") else ""))
    t.add_row("job", job["id"])
    return t


def cv_text_plot(table: list[dict], chosen: dict, *, width: int = 56, height: int = 10) -> str:
    """CV error against penalty strength (log scale) for the chosen basis setting, as text.

    ``*`` marks a candidate, ``O`` the chosen one; the y axis is linear from the lowest to the highest
    mean error shown."""
    basis = chosen.get("basis")
    ratio = (chosen.get("penalty") or {}).get("l1_ratio")
    pts = sorted((r["strength"], r["mean"]) for r in table
                 if r.get("basis") == basis and r.get("l1_ratio") == ratio
                 and isinstance(r.get("mean"), (int, float)) and math.isfinite(r["mean"]))
    if not pts:
        return "(no CV rows for the chosen basis setting)"
    chosen_s = (chosen.get("penalty") or {}).get("strength")
    xs = [math.log10(s) if s > 0 else None for s, _ in pts]
    finite_x = [x for x in xs if x is not None]
    xmin, xmax = (min(finite_x), max(finite_x)) if finite_x else (0.0, 0.0)
    ys = [m for _, m in pts]
    ymin, ymax = min(ys), max(ys)
    grid = [[" "] * width for _ in range(height)]

    def col(x: float | None) -> int:
        if x is None or xmax == xmin:
            return 0
        return round((x - xmin) / (xmax - xmin) * (width - 1))

    def row(y: float) -> int:
        if ymax == ymin:
            return height // 2
        return round((ymax - y) / (ymax - ymin) * (height - 1))

    for (s, m), x in zip(pts, xs):
        mark = "O" if chosen_s is not None and s == chosen_s else "*"
        r, c = row(m), col(x)
        if grid[r][c] != "O":
            grid[r][c] = mark
    metric = chosen.get("metric")
    label_w = max(len(f"{ymax:.4g}"), len(f"{ymin:.4g}"))
    lines = [f"{cv_label(metric)} against penalty strength λ for {_basis_text(basis)} (O = chosen)"]
    for i, cells in enumerate(grid):
        label = f"{ymax:.4g}" if i == 0 else f"{ymin:.4g}" if i == height - 1 else ""
        lines.append(f"{label:>{label_w}} |" + "".join(cells))
    lines.append(" " * label_w + " +" + "-" * width)
    left = f"{pts[0][0]:.3g}"
    right = f"{pts[-1][0]:.3g}"
    lines.append(" " * (label_w + 2) + left + " " * max(1, width - len(left) - len(right) - 5) + right + " (λ, log)")
    return "\n".join(lines)


# ----------------------------------------------------------------------------------------------------
# predictions and models


def parse_ref(ref: str) -> tuple[str, int | None]:
    """``NAME`` or ``NAME@VERSION``."""
    name, at, version = ref.partition("@")
    if not name:
        raise UsageProblem(f"{ref!r} names no model; write NAME or NAME@VERSION, e.g. pump-energy@3.")
    if not at:
        return name, None
    if not version.isdigit() or int(version) < 1:
        raise UsageProblem(f"{ref!r}: the version after '@' must be a whole number >= 1, e.g. pump-energy@3.")
    return name, int(version)


@app.command()
def predict(
    ctx: typer.Context,
    ref: Annotated[str, typer.Argument(metavar="NAME[@VERSION]", help="Model, optionally pinned to a version.")],
    data: Annotated[Path, typer.Option("--data", help="Input rows: a CSV file, or JSON (a list of rows or {\"rows\": [...]}).")],
    interval_level: Annotated[Optional[float], typer.Option(help="Prediction interval level, e.g. 0.9.")] = None,
    out: Annotated[Optional[Path], typer.Option(help="Write the predictions to this file (.csv or .json).")] = None,
    only_inputs: Annotated[bool, typer.Option("--only-inputs", help="Send only the model's input columns (drop the "
                                              "target and any other column of the file).")] = False,
) -> None:
    """Predict with the live version (or a pinned one): values, intervals, extrapolation warnings."""
    name, version = parse_ref(ref)
    if interval_level is not None and not (0 < interval_level < 1):
        raise UsageProblem(f"--interval-level {interval_level:g} is outside (0, 1); give a level such as 0.9.")
    if not data.is_file():
        raise UsageProblem(f"--data {str(data)!r} is not a file; give a CSV or JSON file of input rows.")
    if out is not None and out.suffix.lower() not in (".csv", ".json"):
        raise UsageProblem(f"--out {str(out)!r} must end in .csv or .json (the format follows the suffix).")
    with _client(ctx) as tk:
        if only_inputs:
            pinned = version if version is not None else tk.model(name).get("live_version")
            if pinned is None:
                raise UsageProblem(f"model {name!r} has no live version; name one: {name}@VERSION.")
            inputs = [f["name"] for f in tk.version(name, pinned).get("feature_schema") or []]
            kind, payload = _only_columns(data, inputs)
            answer = tk.predict(name, version=pinned, interval_level=interval_level, **{kind: payload})
        else:
            answer = tk.predict(name, version=version, file=data, interval_level=interval_level)
    model = answer["model"]
    preds = answer["predictions"]
    if out is not None:
        _write_predictions(out, answer, interval_level is not None)
        _err.print(f"tikhon: wrote {len(preds)} predictions of {model['name']} version {model['version']} to {out}")
        return
    if _opts(ctx).json:
        _print_json(answer)
        return
    t = Table(title=f"{model['name']} version {model['version']}: {_basis_text(model.get('basis'))}; "
              f"{_penalty_text(model.get('penalty'))}")
    t.add_column("row", justify="right")
    t.add_column("value", justify="right")
    if interval_level is not None:
        t.add_column(f"{interval_level:g} interval", justify="right")
    t.add_column("warnings")
    for i, p in enumerate(preds):
        cells = [str(i), f"{p['value']:.6g}"]
        if interval_level is not None:
            lo, hi = p.get("interval") or (None, None)
            cells.append(f"[{_num(lo)}, {_num(hi)}]")
        cells.append("; ".join(p.get("warnings") or []))
        t.add_row(*cells)
    _out.print(t)


def _only_columns(path: Path, keep: list[str]) -> tuple[str, Any]:
    """The file's rows restricted to the columns in ``keep`` (CSV cells are passed on as written)."""
    import csv as _csv
    import io

    text = path.read_text(encoding="utf-8")
    if path.suffix.lower() == ".json" or text.lstrip()[:1] in ("[", "{"):
        try:
            doc = json.loads(text)
        except ValueError as exc:
            raise UsageProblem(f"--data {str(path)!r} is not valid JSON ({exc}); give a list of rows.") from None
        rows = doc.get("rows") if isinstance(doc, dict) else doc
        if not isinstance(rows, list) or not all(isinstance(r, dict) for r in rows):
            raise UsageProblem(f"--data {str(path)!r} holds no list of row objects; give [{{...}}, ...] or {{\"rows\": [...]}}.")
        return "rows", [{k: v for k, v in r.items() if k in keep} for r in rows]
    table = list(_csv.reader(io.StringIO(text)))
    if not table:
        raise UsageProblem(f"--data {str(path)!r} is empty; give a header line and rows.")
    header = table[0]
    idx = [i for i, name in enumerate(header) if name in keep]
    buf = io.StringIO()
    w = _csv.writer(buf, lineterminator="\n")
    w.writerows([[row[i] for i in idx] for row in table if row])
    return "csv", buf.getvalue()


def _num(v: Any) -> str:
    return "-" if v is None else f"{v:.6g}"


def _write_predictions(out: Path, answer: dict, with_interval: bool) -> None:
    """Write atomically (temporary name, then rename). CSV numbers are shortest round-trip decimals (a
    null value an empty cell); text cells are neutralized against formula injection."""
    import csv as _csv

    from service.csvcells import number_cell, text_cell

    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".part")
    with open(tmp, "w", newline="", encoding="utf-8") as fh:
        if out.suffix.lower() == ".json":
            json.dump(answer, fh, indent=2)
            fh.write("\n")
        else:
            w = _csv.writer(fh, lineterminator="\n")
            model = answer["model"]
            w.writerow(["model", "version", "value", *(["lower", "upper"] if with_interval else []), "warnings"])
            for p in answer["predictions"]:
                bounds = []
                if with_interval:
                    lo, hi = p.get("interval") or (None, None)
                    bounds = [number_cell(lo), number_cell(hi)]
                w.writerow([text_cell(model["name"]), model["version"], number_cell(p["value"]), *bounds,
                            text_cell("; ".join(p.get("warnings") or []))])
    os.replace(tmp, out)


@app.command()
def models(ctx: typer.Context) -> None:
    """List models with their live and newest versions."""
    with _client(ctx) as tk:
        items = tk.models()
    if _opts(ctx).json:
        _print_json(items)
        return
    t = Table("model", "live", "newest", "versions", "updated")
    for m in items:
        t.add_row(m["name"], str(m.get("live_version") or "-"), str(m.get("newest_version") or "-"),
                  str(m.get("versions")), str(m.get("updated_at") or "")[:19])
    _out.print(t)


@app.command()
def show(
    ctx: typer.Context,
    ref: Annotated[str, typer.Argument(metavar="NAME[@VERSION]", help="Model (its live version) or one version.")],
) -> None:
    """Show a version: chosen point, CV error, inputs and their training ranges, checksums."""
    name, version = parse_ref(ref)
    with _client(ctx) as tk:
        if version is None:
            model = tk.model(name)
            version = model.get("live_version")
            if version is None:
                raise UsageProblem(f"model {name!r} has no live version; name one: {name}@VERSION "
                                   f"(versions: {model.get('versions')}).")
        meta = tk.version(name, version)
    if _opts(ctx).json:
        _print_json(meta)
        return
    chosen = meta.get("chosen") or {}
    summary = meta.get("cv_summary") or {}
    t = Table(title=f"{name} version {meta['version']}", show_header=False)
    t.add_column("what", style="bold")
    t.add_column("value")
    t.add_row("target", str((meta.get("spec") or {}).get("target")))
    t.add_row("chosen basis", _basis_text(chosen.get("basis")))
    t.add_row("chosen penalty", _penalty_text(chosen.get("penalty")))
    t.add_row(cv_label(chosen.get("metric")), _pm_text(chosen, summary.get("splits"))
              + f"; {summary.get('scheme')}, rule {chosen.get('rule')}")
    for f in meta.get("feature_schema") or []:
        rng = f.get("range")
        levels = f.get("levels")
        desc = f"{f.get('type')}" + (f", trained on [{rng[0]:.6g}, {rng[1]:.6g}]" if rng else "") + (
            f", levels {', '.join(map(str, levels))}" if levels else "")
        t.add_row(f"input {f.get('name')}", desc)
    fp = meta.get("data_fingerprint") or {}
    lineage = meta.get("lineage") or {}
    if lineage.get("parent_version") is not None:
        t.add_row("continued from", f"version {lineage['parent_version']}: {lineage.get('new_rows')} new rows merged "
                  f"({lineage.get('rows')} in all), earlier rows weighted {lineage.get('old_weight'):g}")
        t.add_row("new data", f"{fp.get('rows')} rows, sha256 {str(fp.get('sha256'))[:16]}…")
    else:
        t.add_row("training data", f"{fp.get('rows')} rows, sha256 {str(fp.get('sha256'))[:16]}…")
    t.add_row("created", str(meta.get("created_at")))
    t.add_row("job", str(meta.get("job_id")))
    sums = meta.get("checksums") or {}
    t.add_row("manifest sha256", str(sums.get("manifest_sha256")))
    t.add_row("arrays sha256", str(sums.get("arrays_sha256")))
    t.add_row("live", "yes" if meta.get("live") else "no")
    _out.print(t)
    _print_warnings(meta)


@app.command()
def plot(
    ctx: typer.Context,
    ref: Annotated[str, typer.Argument(metavar="NAME[@VERSION]", help="Model (its live version) or one version.")],
    kind: Annotated[str, typer.Option(help="cv (error against strength), path (coefficients against strength), "
                                      "residuals (out of fold), or history (every version).")] = "cv",
    out: Annotated[Optional[Path], typer.Option(help="File to write, .svg or .png [default: NAME-vVERSION-KIND.svg].")] = None,
) -> None:
    """Save a figure of a version (or the model's history) as SVG or PNG."""
    name, version = parse_ref(ref)
    if kind not in (*PLOT_KINDS, "history"):
        raise UsageProblem(f"--kind {kind!r} is not offered; use {', '.join(PLOT_KINDS)} or history.")
    fmt = (out.suffix.lower().lstrip(".") if out is not None else "svg") or "svg"
    if fmt not in ("svg", "png"):
        raise UsageProblem(f"--out {str(out)!r} must end in .svg or .png (the format follows the suffix).")
    with _client(ctx) as tk:
        if kind == "history":
            data = tk.plot_history(name, format=fmt)
            target = out or Path(f"{name}-history.{fmt}")
        else:
            if version is None:
                version = tk.model(name).get("live_version")
                if version is None:
                    raise UsageProblem(f"model {name!r} has no live version; name one: {name}@VERSION.")
            data = tk.plot(name, version, kind, format=fmt)
            target = out or Path(f"{name}-v{version}-{kind}.{fmt}")
    _write_file(ctx, target, data, model=name, version=version, kind=kind)


def _write_file(ctx: typer.Context, target: Path, data: bytes, **about: Any) -> None:
    """Write ``data`` whole or not at all (a ``.part`` file renamed into place), then say so."""
    tmp = target.with_name(target.name + ".part")
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp.write_bytes(data)
    os.replace(tmp, target)
    if _opts(ctx).json:
        _print_json({"file": str(target), "bytes": len(data), **about})
    else:
        _out.print(f"wrote {target} ({len(data)} bytes)")


@app.command()
def monitor(
    ctx: typer.Context,
    ref: Annotated[str, typer.Argument(metavar="NAME[@VERSION]", help="Model (its live version) or one version.")],
    since: Annotated[str, typer.Option(help="Start: a span back from now (90m, 36h, 7d) or an ISO 8601 time.")] = "7d",
    until: Annotated[Optional[str], typer.Option(help="End [default: now].")] = None,
) -> None:
    """Input drift (PSI per input) and real-world error of scored outcomes since training."""
    name, version = parse_ref(ref)
    with _client(ctx) as tk:
        inputs = tk.inputs(name, version=version, since=since, until=until)
        outcomes = tk.outcomes(name, version=inputs["version"], since=since, until=until)
    if _opts(ctx).json:
        _print_json({"inputs": inputs, "outcomes": outcomes})
        return
    t = Table(title=f"{name} version {inputs['version']}: inputs from {inputs['from'][:16]} to {inputs['to'][:16]} "
                    f"({inputs['rows']} rows)")
    for col in ("input", "kind", "PSI", "flag", "outside range"):
        t.add_column(col, justify="right" if col in ("PSI", "outside range") else "left")
    for f in inputs.get("features") or []:
        psi = "-" if f.get("psi") is None else f"{f['psi']:.3f}"
        out = f.get("outside_range")
        t.add_row(f["name"], f["kind"], psi, f.get("flag") or "", "-" if out is None else f"{100 * out:.1f} %")
    _out.print(t)
    m = outcomes.get("metrics") or {}
    cv = outcomes.get("cv") or {}

    def num(v: Any) -> str:
        return "-" if v is None else f"{v:.4g}"

    o = Table(title=f"outcomes ({outcomes['rows']} scored rows)", show_header=False)
    o.add_column("what", style="bold")
    o.add_column("value")
    o.add_row("RMSE", num(m.get("rmse")))
    o.add_row("MAE", num(m.get("mae")))
    o.add_row("0.9 interval coverage", "-" if m.get("coverage90") is None else f"{100 * m['coverage90']:.1f} %")
    o.add_row(f"CV {str(cv.get('metric') or '').upper()}", f"{num(cv.get('mean'))} (std over folds {num(cv.get('std'))})")
    _out.print(o)
    for w in (inputs.get("warnings") or []) + (outcomes.get("warnings") or []):
        _out.print(f"warning: {' '.join(str(w).split())}")


@app.command()
def export(
    ctx: typer.Context,
    ref: Annotated[str, typer.Argument(metavar="NAME[@VERSION]", help="Model (its live version) or one version.")],
    format: Annotated[str, typer.Option("--format", help="json (the model's formula as numbers, to evaluate anywhere) "
                                        "or sklearn (a joblib file of a scikit-learn Pipeline).")] = "json",
    out: Annotated[Optional[Path], typer.Option(help="File to write [default: NAME-vVERSION.json or .joblib].")] = None,
) -> None:
    """Write a version in a form that leaves the service (loading a joblib file runs code: load only your own exports)."""
    name, version = parse_ref(ref)
    if format not in ("json", "sklearn"):
        raise UsageProblem(f"--format {format!r} is not offered; use json or sklearn.")
    with _client(ctx) as tk:
        if version is None:
            version = tk.model(name).get("live_version")
            if version is None:
                raise UsageProblem(f"model {name!r} has no live version; name one: {name}@VERSION.")
        got = tk.export(name, version, format=format)
    data = json.dumps(got, indent=1).encode() + b"\n" if format == "json" else got
    target = out or Path(f"{name}-v{version}." + ("json" if format == "json" else "joblib"))
    _write_file(ctx, target, data, model=name, version=version, format=format)


@app.command()
def promote(
    ctx: typer.Context,
    name: Annotated[str, typer.Argument(help="Model name.")],
    version: Annotated[int, typer.Argument(help="Version to make live.", min=1)],
    reason: Annotated[str, typer.Option("--reason", help="Why (kept in the history).")],
) -> None:
    """Make a version live (admin scope); the change and the reason go into the history."""
    with _client(ctx) as tk:
        result = tk.set_live(name, version, reason)
    if _opts(ctx).json:
        _print_json(result)
        return
    change = result.get("change") or {}
    if result.get("already_live") or (change.get("changed") is False and change.get("from_version") == version):
        _out.print(f"{name}: version {version} is already live; nothing changed (no history entry)")
        return
    _out.print(f"{name}: live version {change.get('from_version') or '-'} -> {result['live_version']}")


@app.command()
def history(ctx: typer.Context, name: Annotated[str, typer.Argument(help="Model name.")]) -> None:
    """Every change of a model's live version: when, who, from, to, why."""
    with _client(ctx) as tk:
        entries = tk.history(name)
    if _opts(ctx).json:
        _print_json(entries)
        return
    t = Table("when (UTC)", "version", "decision", "live", "by", "reason")
    for h in entries:
        details = h.get("details") if isinstance(h.get("details"), dict) else {}
        not_live = details.get("not_made_live")
        version = not_live if not_live is not None else h.get("to_version")
        decision = h.get("decision") or ("not made live" if not_live is not None else "went live")
        live = (f"{h.get('from_version') or '-'} -> {h.get('to_version') or '-'}" if not_live is None
                else f"{h.get('to_version') or '-'} (unchanged)")
        t.add_row(str(h.get("at"))[:19].replace("T", " "), str(version or "-"), decision, live,
                  str(h.get("actor")), str(h.get("reason")))
    _out.print(t)


@app.command()
def prune(
    ctx: typer.Context,
    keep: Annotated[int, typer.Option("--keep", min=0, help="Newest versions to keep besides the live one.")],
    names: Annotated[Optional[list[str]], typer.Argument(help="Models to prune (default: every model).")] = None,
    dry_run: Annotated[bool, typer.Option("--dry-run", help="List what would be deleted; delete nothing.")] = False,
    yes: Annotated[bool, typer.Option("--yes", "-y", help="Do not ask for confirmation on a terminal.")] = False,
) -> None:
    """Delete old versions: all but the live one and the newest --keep (admin scope). On a terminal it
    lists what would go and asks first (--yes skips the question); --dry-run only lists."""
    with _client(ctx) as tk:
        targets = list(names or [m["name"] for m in tk.models()])
        if dry_run or (not yes and sys.stdin.isatty()):
            plans = [tk.prune(n, keep, dry_run=True) for n in targets]
            if dry_run:
                if _opts(ctx).json:
                    _print_json(plans)
                    return
                for r in plans:
                    _out.print(f"{r['name']}: would delete {', '.join(map(str, r['deleted'])) or 'nothing'}; would keep "
                               f"{', '.join(map(str, r['remaining'])) or 'nothing'} (live {r.get('live_version') or '-'})")
                return
            doomed = sum(len(r["deleted"]) for r in plans)
            if doomed == 0:
                _out.print("nothing to delete: " + "; ".join(f"{r['name']} keeps {', '.join(map(str, r['remaining'])) or 'nothing'}"
                                                           for r in plans))
                return
            for r in plans:
                if r["deleted"]:
                    _err.print(f"{r['name']}: will delete version(s) {', '.join(map(str, r['deleted']))}; keeps "
                               f"{', '.join(map(str, r['remaining']))} (live {r.get('live_version') or '-'})")
            if not typer.confirm(f"Delete {doomed} version(s)? Their files are removed for good", default=False):
                _err.print("tikhon: nothing deleted")
                raise typer.Exit(1)
        results = [tk.prune(n, keep) for n in targets]
    if _opts(ctx).json:
        _print_json(results)
        return
    for r in results:
        deleted = ", ".join(map(str, r["deleted"])) or "nothing"
        _out.print(f"{r['name']}: deleted {deleted}; kept {', '.join(map(str, r['remaining'])) or 'nothing'} "
                   f"(live {r.get('live_version') or '-'})")


# ----------------------------------------------------------------------------------------------------
# API keys


@keys_app.command("create")
def keys_create(
    ctx: typer.Context,
    scope: Annotated[list[str], typer.Option("--scope", help="predict, train, admin or metrics; repeatable.")],
    label: Annotated[str, typer.Option(help="Who or what uses the key.")] = "",
    local: Annotated[bool, typer.Option("--local", help="Write the key into the catalog of this machine's settings "
                                        "(TIKHON_STORE / TIKHON_DATABASE_URL) without a server: the bootstrap of a "
                                        "server that must listen beyond loopback.")] = False,
) -> None:
    """Create an API key. Its secret is printed once; store it now."""
    if local:
        from service.store import Store

        with Store(_settings()) as store:
            key_id, secret = store.keys.create(scope, label)
            made = {**next(k for k in store.keys.list() if k["key_id"] == key_id), "secret": secret}
    else:
        with _client(ctx) as tk:
            made = tk.create_key(scope, label)
    if _opts(ctx).json:
        _print_json(made)
        return
    _err.print(f"tikhon: key {made['key_id']} with scope(s) {', '.join(made['scopes'])}; the secret below is shown "
               "only now:")
    sys.stdout.write(made["secret"] + "\n")


@keys_app.command("list")
def keys_list(ctx: typer.Context) -> None:
    """List API keys (never their secrets)."""
    with _client(ctx) as tk:
        items = tk.keys()
    if _opts(ctx).json:
        _print_json(items)
        return
    t = Table("key id", "scopes", "label", "created", "revoked")
    for k in items:
        t.add_row(k["key_id"], ", ".join(k["scopes"]), k.get("label") or "", str(k.get("created_at"))[:19],
                  str(k.get("revoked_at") or "")[:19])
    _out.print(t)


@keys_app.command("revoke")
def keys_revoke(
    ctx: typer.Context,
    key_id: Annotated[str, typer.Argument(help="The key id ('tikhon keys list').")],
    local: Annotated[bool, typer.Option("--local", help="Revoke in the catalog of this machine's settings "
                                        "(TIKHON_STORE / TIKHON_DATABASE_URL) without a server; the only way to "
                                        "revoke the last admin key. A running server stays closed: it then "
                                        "answers 401 until a new key is made.")] = False,
) -> None:
    """Revoke an API key (the last admin key only with --local)."""
    if local:
        from service.store import Store

        with Store(_settings()) as store:
            entry = store.keys.revoke(key_id)
    else:
        with _client(ctx) as tk:
            entry = tk.revoke_key(key_id)
    if _opts(ctx).json:
        _print_json(entry)
    else:
        _out.print(f"key {entry['key_id']} revoked at {entry.get('revoked_at')}")


# ----------------------------------------------------------------------------------------------------
# the local store


@store_app.command("recover")
def store_recover(
    ctx: typer.Context,
    live: Annotated[str, typer.Option("--live", help="'newest': make the newest recovered version of each model "
                                      "that has no live version live (recorded in its history); 'none': leave "
                                      "every model without a live version.")] = "none",
    dry_run: Annotated[bool, typer.Option("--dry-run", help="Verify and list what would be registered; write "
                                          "nothing.")] = False,
) -> None:
    """Register the version folders of this machine's store (TIKHON_STORE) that its catalog
    (TIKHON_DATABASE_URL) does not list, after verifying each one fully. Nothing is moved or deleted."""
    from service.store import Store

    with Store(_settings()) as store:
        report = store.recover(dry_run=dry_run, live=live)
    if _opts(ctx).json:
        _print_json(report)
    else:
        verb = "would register" if dry_run else "registered"
        done = ", ".join(f"{r['name']}/{r['version']}" for r in report["registered"]) or "nothing"
        _out.print(f"{verb} {len(report['registered'])} version(s): {done}")
        for r in report["made_live"]:
            _out.print(f"{r['name']}: version {r['version']} is live")
        for r in report["refused"]:
            _err.print(f"refused {r['path']}: {r['reason']}")
    if report["refused"]:
        raise typer.Exit(1)


# ----------------------------------------------------------------------------------------------------
# entry point


def _fail(message: str, code: int) -> int:
    sys.stderr.write("tikhon: error: " + " ".join(str(message).split()) + "\n")
    return code


def _parser_errors() -> tuple[tuple[type, ...], tuple[type, ...], tuple[type, ...], tuple[type, ...]]:
    """(no-args-help, usage error, exit, abort) exception classes of the command-line parser.

    Recent typer releases carry their own copy of click (``typer._click``); older ones use click itself.
    Both are looked up so the command line behaves the same with either."""
    import importlib

    help_, usage, exit_, abort = [], [], [typer.Exit], [typer.Abort]
    for module in ("typer._click.exceptions", "click.exceptions"):
        try:
            m = importlib.import_module(module)
        except ImportError:
            continue
        for attr, into in (("NoArgsIsHelpError", help_), ("NoArgsIsHelp", help_), ("UsageError", usage),
                           ("Exit", exit_), ("Abort", abort)):
            cls = getattr(m, attr, None)
            if isinstance(cls, type):
                into.append(cls)
    return tuple(help_), tuple(usage), tuple(exit_), tuple(abort)


_GLOBAL_FLAGS = ("--json",)
_GLOBAL_VALUED = ("--url", "--key", "--timeout")


def _globals_first(args: list[str]) -> list[str]:
    """Move the global options to the front, so ``tikhon models --json`` works like ``tikhon --json models``.
    No command has options of these names; everything after ``--`` is left alone."""
    front: list[str] = []
    rest: list[str] = []
    i = 0
    while i < len(args):
        word = args[i]
        if word == "--":
            rest.extend(args[i:])
            break
        if word in _GLOBAL_FLAGS or word.split("=", 1)[0] in _GLOBAL_VALUED and "=" in word:
            front.append(word)
        elif word in _GLOBAL_VALUED and i + 1 < len(args):
            front.extend(args[i:i + 2])
            i += 1
        else:
            rest.append(word)
        i += 1
    return front + rest


# What a value is, in words, for the help text (instead of the parser's type names such as <list[str]>).
_METAVARS = {
    "data": "FILE", "source": "PATH", "target": "COLUMN", "spec": "FILE", "basis": "BASIS", "feature": "COLUMN",
    "categorical": "COLUMN", "promote": "always|if_better|never", "min_improvement": "NUMBER", "idempotency_key": "TEXT",
    "interval_level": "LEVEL", "out": "FILE", "kind": "KIND", "keep": "COUNT", "scope": "predict|train|admin",
    "label": "TEXT", "reason": "TEXT", "url": "URL", "key": "KEY", "timeout": "SECONDS", "live": "newest|none",
    "host": "ADDRESS", "port": "PORT", "version": "VERSION", "name": "NAME", "names": "NAME", "job_id": "JOB",
    "key_id": "KEY_ID", "ref": "NAME[@VERSION]", "workers": "COUNT", "continue_from": "VERSION",
    "old_weight": "WEIGHT",
}


def _human_help(command: Any) -> None:
    """Give every option and argument a plain metavar, and the --url default the port this environment
    uses (TIKHON_PORT), read when the command line runs rather than at import."""
    port = os.environ.get("TIKHON_PORT", "").strip()
    port = port if port.isdigit() else "8000"
    stack = [command]
    while stack:
        cmd = stack.pop()
        stack.extend(getattr(cmd, "commands", {}).values())
        for param in cmd.params:
            is_flag = getattr(param, "is_flag", False) or getattr(param, "count", False)
            if not is_flag and param.name in _METAVARS and param.metavar in (None, ""):
                param.metavar = _METAVARS[param.name]
            if getattr(param, "param_type_name", "") == "argument" and hasattr(param, "display_type_rich"):
                param.display_type_rich = lambda ctx=None: None  # "NAME  Model name.", not "NAME <str>"
            if getattr(param, "param_type_name", "") == "option" and param.name == "url":
                param.help = (f"Server address [default: http://127.0.0.1:{port}, from TIKHON_PORT]." if port != "8000"
                              else "Server address [default: http://127.0.0.1:8000; TIKHON_PORT changes the port].")


def _fail_service(exc: ServiceError, args: list[str]) -> int:
    """One line for a refused or failed call; a missing or wrong API key is explained in the CLI's own
    terms (--key / TIKHON_KEY), not as an HTTP header."""
    unauthorized = isinstance(exc, ClientProblem) and exc.status == 401
    if unauthorized and "no active key exists" in (exc.detail or ""):
        return _fail(exc.detail, 2)  # the server has no key left at all: its own words say what to do (--local)
    if unauthorized:
        given = bool(os.environ.get("TIKHON_KEY")) or any(a == "--key" or a.startswith("--key=") for a in args)
        if given:
            return _fail("the API key given with --key or TIKHON_KEY is unknown or revoked on this server; use an "
                         "active key ('tikhon keys list' shows them; an admin makes one with 'tikhon keys create "
                         "--scope ...').", 2)
        return _fail("this server needs an API key: pass --key KEY or set TIKHON_KEY (an admin makes one with "
                     "'tikhon keys create --scope predict|train|admin').", 2)
    # a 4xx answer is bad usage (exit 2); no answer, a 5xx or a wait that gave up is a failure (exit 1)
    return _fail(str(exc), 2 if isinstance(exc, ClientProblem) else 1)


def main(argv: list[str] | None = None) -> int:
    """Run the command line; return (and, as a console script, exit with) the exit code."""
    from service.errors import TikhonError

    no_args_help, usage_error, exit_, abort = _parser_errors()
    command = typer.main.get_command(app)
    _human_help(command)
    args = _globals_first(list(sys.argv[1:] if argv is None else argv))
    try:
        result = command.main(args=args, prog_name="tikhon", standalone_mode=False)
        code = result if isinstance(result, int) else 0
    except no_args_help as exc:
        ctx = getattr(exc, "ctx", None)
        sys.stdout.write((ctx.get_help() if ctx is not None else "Usage: tikhon COMMAND [ARGS]...") + "\n")
        code = 2
    except usage_error as exc:
        ctx = getattr(exc, "ctx", None)
        path = ctx.command_path if ctx is not None else "tikhon"
        code = _fail(f"{exc.format_message()} (see '{path} --help')", 2)
    except exit_ as exc:
        code = int(getattr(exc, "exit_code", 0) or 0)
    except abort:
        code = _fail("interrupted", 130)
    except KeyboardInterrupt:
        code = _fail("interrupted", 130)
    except UsageProblem as exc:
        code = _fail(str(exc), 2)
    except JobFailed as exc:
        code = _fail(str(exc), 1)
    except TrainedNotLive as exc:
        sys.stderr.write("tikhon: " + " ".join(str(exc).split()) + "\n")
        code = 3
    except ServiceError as exc:
        code = _fail_service(exc, args)
    except InvalidArgument as exc:  # the client refused an argument before sending anything
        code = _fail(str(exc), 2)
    except TikhonError as exc:  # serve / worker / keys --local: the service's own refusals
        from service.errors import Forbidden, InvalidData, InvalidName, InvalidSpec

        code = _fail(str(exc), 2 if isinstance(exc, (Forbidden, InvalidData, InvalidSpec, InvalidName)) else 1)
    except OSError as exc:
        code = _fail(f"{exc.strerror or exc} ({exc.filename})" if getattr(exc, "filename", None) else str(exc), 1)
    except Exception as exc:  # one line, never a traceback; TIKHON_DEBUG=1 re-raises for a traceback
        if os.environ.get("TIKHON_DEBUG") == "1":
            raise
        code = _fail(f"unexpected {type(exc).__name__}: {exc}; run again with TIKHON_DEBUG=1 for the traceback and "
                     "report it", 1)
    return code


if __name__ == "__main__":
    sys.exit(main())
