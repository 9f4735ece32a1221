"""Every request costs bounded memory: hostile-but-valid requests against a real server process.

Each test measures the server process's peak resident memory over one request: the peak (``VmHWM``
in ``/proc/PID/status``) is reset before the request by writing ``5`` to ``/proc/PID/clear_refs``
(Linux proc(5)), and the growth ``VmHWM - VmRSS(before)`` is compared with a bound that the old code
exceeded many times over. The sizes are chosen so that the unbounded code allocates hundreds of
megabytes while the bounded code answers in a few seconds; no test asserts a duration.
"""

from __future__ import annotations

import io
import json
from pathlib import Path

import httpx
import numpy as np
import pytest

from procmem import peak_growth  # tests/procmem.py (tests/ is on pytest's pythonpath)

MiB = 2**20
CAT = "stations"
WIDE = "wide"
WIDE_FEATURES = [f"x{i}" for i in range(8)]  # 8 inputs at polynomial degree 4: 494 basis terms


def _wide_rows(n: int, seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, len(WIDE_FEATURES)))
    cols = {f: X[:, j] for j, f in enumerate(WIDE_FEATURES)}
    cols["y"] = X.sum(axis=1) + 0.3 * X[:, 0] * X[:, 1] + rng.normal(scale=0.1, size=n)
    return cols


@pytest.fixture(scope="module")
def srv(tmp_path_factory, rk):
    from service.demo import pump_stations
    from service.engine import tune

    root = tmp_path_factory.mktemp("bounded")
    settings = rk.base_settings(root, embedded_worker=False, log_level="warning",
                                predict_memory_bytes=16 * MiB)
    store = rk.open_store(settings)
    d = pump_stations(600, seed=4)
    spec = {"target": "energy_kwh", "features": ["flow_lps", "head_m"], "categorical": ["station"],
            "bases": [{"kind": "linear"}], "penalty": {"kind": "l2", "strengths": [0.01, 1.0]},
            "cv": {"folds": 3, "seed": 1}}
    body, arrays = tune({k: d[k] for k in ("station", "flow_lps", "head_m", "energy_kwh")}, spec).to_artifact()
    store.set_live(CAT, store.publish(CAT, body, arrays)["version"], actor="test", reason="fixture")
    wide = {"target": "y", "features": WIDE_FEATURES, "bases": [{"kind": "polynomial", "degrees": [4]}],
            "penalty": {"kind": "l2", "strengths": [1.0, 10.0]}, "cv": {"folds": 3, "seed": 2}}
    body, arrays = tune(_wide_rows(700, 3), wide).to_artifact()
    store.set_live(WIDE, store.publish(WIDE, body, arrays)["version"], actor="test", reason="fixture")
    store.close()
    with rk.server_process(root, **{k: v for k, v in settings.items() if k not in ("store", "data_dir")},
                           store=settings["store"], data_dir=settings["data_dir"]) as server:
        # warm up: the first request of each kind loads the model and imports what it needs
        httpx.post(f"{server.base}/v1/models/{CAT}/predictions", timeout=60,
                   json={"rows": [{"station": "mill-lane", "flow_lps": 70.0, "head_m": 35.0}] * 300})
        httpx.post(f"{server.base}/v1/models/{WIDE}/predictions?interval_level=0.9", timeout=60,
                   content=_csv(_wide_rows(300, 5), WIDE_FEATURES), headers={"content-type": "text/csv"})
        yield server


def _csv(cols: dict[str, np.ndarray], names: list[str]) -> bytes:
    out = io.StringIO()
    out.write(",".join(names) + "\n")
    np.savetxt(out, np.column_stack([cols[c] for c in names]), delimiter=",", fmt="%.6f")
    return out.getvalue().encode()


# ---------------------------------------------------------------------------------------------------
# 1. one long category label


def test_one_long_label_among_many_rows_is_refused_in_bounded_memory(srv, rk):
    # 20,000 rows and one 10,000-character label: as a fixed-width "<U10000" column that is
    # 20,000 x 10,000 x 4 bytes = 800 MB (the unbounded code answered 200 after allocating it).
    n, long_at = 20_000, 12_345
    lines = [b"station,flow_lps,head_m"] + [b"mill-lane,70,35"] * n
    lines[1 + long_at] = b"x" * 10_000 + b",70,35"
    body = b"\n".join(lines) + b"\n"
    grew, r = peak_growth(srv.pid, lambda: httpx.post(
        f"{srv.base}/v1/models/{CAT}/predictions", content=body, headers={"content-type": "text/csv"}, timeout=300))
    assert grew < 150 * MiB, f"peak grew by {grew / MiB:.0f} MiB"
    p = rk.assert_problem(r, 422)
    assert p["limit"] == "max_label_chars" and p["allowed"] == 256 and p["received"] == 10_000
    assert f"row {long_at}" in p["detail"] and "'station'" in p["detail"]


def test_labels_under_the_cap_cost_per_label_not_per_longest_label():
    # In process, with numpy's allocations traced (numpy reports them to tracemalloc): 50,000 rows of
    # which one holds a 256-character label (at the cap). A fixed-width "<U256" column would be
    # 50,000 x 256 x 4 bytes = 51 MB per copy, in the JSON, CSV and training paths alike.
    import tracemalloc

    from service import tables
    from service.engine.table import categorical_column

    n = 50_000
    rows = [{"station": "mill-lane", "flow_lps": 70.0}] * n
    rows[777] = {"station": "z" * 256, "flow_lps": 70.0}
    csv = ("station,flow_lps\n" + "mill-lane,70\n" * 777 + "z" * 256 + ",70\n" + "mill-lane,70\n" * (n - 778)).encode()
    for parse in (lambda: tables.from_rows(rows), lambda: tables.from_csv(csv)):
        categorical_column(parse(), "station")  # warm-up: the first call imports pyarrow's compute kernels
        tracemalloc.start()
        try:
            cols = parse()
            labels = categorical_column(cols, "station")
            _, peak = tracemalloc.get_traced_memory()
        finally:
            tracemalloc.stop()
        assert labels.dtype == object and labels[777] == "z" * 256 and labels[0] == "mill-lane"
        assert peak < 12 * MiB, f"peak {peak / MiB:.1f} MiB"


# ---------------------------------------------------------------------------------------------------
# 2. a new level on every row


def test_a_new_level_on_every_row_is_refused_before_one_hot_expansion(srv, rk):
    # 12,000 rows with 3,500 distinct labels: the one-hot block alone is 12,000 x 3,500 x 8 bytes = 336 MB
    # (the unbounded code built it, and then accepted the job).
    n, levels = 12_000, 3_500
    rng = np.random.default_rng(7)
    csv = "site,flow_lps,energy_kwh\n" + "".join(
        f"s{i % levels:05d},{rng.uniform(10, 90):.3f},{rng.uniform(50, 400):.3f}\n" for i in range(n))
    spec = {"target": "energy_kwh", "features": ["flow_lps"], "categorical": ["site"],
            "bases": [{"kind": "linear"}], "penalty": {"kind": "l2", "strengths": [1.0]}, "cv": {"folds": 3}}
    grew, r = peak_growth(srv.pid, lambda: httpx.post(
        f"{srv.base}/v1/models/{CAT}/trainings", json={"data": {"csv": csv}, "spec": spec}, timeout=300))
    assert grew < 150 * MiB, f"peak grew by {grew / MiB:.0f} MiB"
    p = rk.assert_problem(r, 422)
    assert p["limit"] == "max_levels" and p["allowed"] == 1_000 and p["received"] == levels
    assert "'site'" in p["detail"] and "3,500" in p["detail"]


# ---------------------------------------------------------------------------------------------------
# 3. batch predictions on a wide model


def test_batch_prediction_on_a_wide_model_stays_within_the_memory_budget(srv):
    # 30,000 rows through 494 basis terms: one design copy is 30,000 x 494 x 8 bytes = 119 MB and the
    # unbounded code held several (design, centred copy, scaled copy, leverage product). With
    # predict_memory_bytes = 16 MiB the server computes the same numbers chunk by chunk.
    rows = _wide_rows(30_000, 6)
    body = _csv(rows, WIDE_FEATURES)
    grew, r = peak_growth(srv.pid, lambda: httpx.post(
        f"{srv.base}/v1/models/{WIDE}/predictions?interval_level=0.9", content=body,
        headers={"content-type": "text/csv", "accept": "application/json"}, timeout=300))
    assert grew < 160 * MiB, f"peak grew by {grew / MiB:.0f} MiB"
    assert r.status_code == 200, r.text[:500]
    preds = r.json()["predictions"]
    assert len(preds) == 30_000
    # rows 0-99 and the last 100 rows again, each block alone: the same values and intervals (to
    # rounding: a matrix product may sum in another order for another block size)
    lines = body.split(b"\n")
    for block in (lines[1:101], lines[-101:-1]):
        alone = httpx.post(f"{srv.base}/v1/models/{WIDE}/predictions?interval_level=0.9", content=b"\n".join([lines[0], *block]),
                           headers={"content-type": "text/csv", "accept": "application/json"}, timeout=60).json()
        first = 0 if block[0] == lines[1] else 30_000 - 100
        for a, b in zip(alone["predictions"], preds[first:first + 100]):
            assert a["value"] == pytest.approx(b["value"], rel=1e-9, abs=1e-9)
            assert a["interval"] == pytest.approx(b["interval"], rel=1e-9, abs=1e-9)


# ---------------------------------------------------------------------------------------------------
# 4. /metrics reads counts, never job bodies


@pytest.fixture(scope="module")
def heavy_jobs(tmp_path_factory, rk):
    """A server whose catalog holds 110 jobs, each request carrying a 1 MB string (entered through the
    store directly, as an older server without spec caps accepted them); 7 of them cancelled."""
    root = tmp_path_factory.mktemp("heavy-jobs")
    settings = rk.base_settings(root, embedded_worker=False, log_level="warning")
    store = rk.open_store(settings)
    ids = [store.jobs.submit("pumps", {"spec": {"target": "energy_kwh", "units": {"energy_kwh": f"{i}" + "k" * MiB}}})[0]["id"]
           for i in range(110)]
    for job_id in ids[:7]:
        store.jobs.cancel(job_id)
    store.close()
    with rk.server_process(root, **{k: v for k, v in settings.items() if k not in ("store", "data_dir")},
                           store=settings["store"], data_dir=settings["data_dir"]) as server:
        httpx.get(f"{server.base}/metrics", timeout=60)  # warm-up
        yield server


def test_metrics_scrape_reads_no_job_bodies_and_counts_every_job(heavy_jobs):
    grew, r = peak_growth(heavy_jobs.pid, lambda: httpx.get(f"{heavy_jobs.base}/metrics", timeout=120))
    # the unbounded scrape loaded the newest 100 job rows in full: 100 x 1 MB of JSON, parsed
    assert grew < 30 * MiB, f"peak grew by {grew / MiB:.0f} MiB"
    assert r.status_code == 200
    gauge = {line.split('"')[1]: float(line.split()[-1]) for line in r.text.splitlines()
             if line.startswith("tikhon_training_jobs{")}
    # all 110 jobs, not the newest 100: 103 queued + 7 cancelled
    assert gauge == {"queued": 103.0, "running": 0.0, "succeeded": 0.0, "failed": 0.0, "cancelled": 7.0}


# ---------------------------------------------------------------------------------------------------
# 5. spec size caps


def test_a_spec_with_a_huge_string_is_refused_naming_the_field(srv, rk):
    spec = {"target": "energy_kwh", "features": ["flow_lps", "head_m"], "bases": [{"kind": "linear"}],
            "units": {"energy_kwh": "k" * (20 * MiB)}}
    rows = [{"flow_lps": 10.0 + i, "head_m": 20.0 + i % 5, "energy_kwh": 30.0 + 2 * i} for i in range(30)]
    body = json.dumps({"data": {"rows": rows}, "spec": spec}).encode()
    grew, r = peak_growth(srv.pid, lambda: httpx.post(f"{srv.base}/v1/models/{CAT}/trainings", content=body,
                                                      headers={"content-type": "application/json"}, timeout=120))
    # the body itself is 20 MB; the unbounded server also validated, copied and stored it in the catalog
    assert grew < 90 * MiB, f"peak grew by {grew / MiB:.0f} MiB"
    p = rk.assert_problem(r, 422)
    assert p["limit"] == "max_spec_string_chars" and p["allowed"] == 1_000 and p["received"] == 20 * MiB
    assert p["errors"][0]["field"] == "spec.units.energy_kwh"
    assert httpx.get(f"{srv.base}/v1/trainings", timeout=60).json()["trainings"] == []


def test_a_spec_larger_than_the_cap_is_refused(srv, rk):
    strengths = [round(1e-4 * 1.001 ** i, 9) for i in range(8_000)]  # about 100 KB of JSON
    spec = {"target": "energy_kwh", "features": ["flow_lps", "head_m"], "bases": [{"kind": "linear"}],
            "penalty": {"kind": "l2", "strengths": strengths}}
    rows = [{"flow_lps": 10.0 + i, "head_m": 20.0 + i % 5, "energy_kwh": 30.0 + 2 * i} for i in range(30)]
    r = httpx.post(f"{srv.base}/v1/models/{CAT}/trainings", json={"data": {"rows": rows}, "spec": spec}, timeout=120)
    p = rk.assert_problem(r, 422)
    assert p["limit"] == "max_spec_bytes" and p["allowed"] == 64 * 1024 and p["received"] > 64 * 1024
    assert p["errors"][0]["field"] == "spec"


# ---------------------------------------------------------------------------------------------------
# 8. queue limits


QUICK_ROWS = [{"flow_lps": 10.0 + i, "head_m": 20.0 + i % 5, "energy_kwh": 30.0 + 2 * i} for i in range(30)]
QUICK = {"target": "energy_kwh", "features": ["flow_lps", "head_m"], "bases": [{"kind": "linear"}],
         "penalty": {"kind": "l2", "strengths": [0.1, 1.0]}, "cv": {"folds": 3}}


def test_a_full_queue_refuses_with_429_before_reading_the_data(heavy_jobs, rk):
    # 103 jobs are queued, above the default max_queued_jobs=100: a 30 MB CSV training body is refused
    # before it is parsed (the unbounded server parsed, validated and staged it, then queued job 104).
    csv = "flow_lps,head_m,energy_kwh\n" + "12.5,31.25,40.125\n" * 1_700_000
    body = json.dumps({"data": {"csv": csv}, "spec": QUICK}).encode()
    grew, r = peak_growth(heavy_jobs.pid, lambda: httpx.post(
        f"{heavy_jobs.base}/v1/models/pumps/trainings", content=body, headers={"content-type": "application/json"},
        timeout=300))
    assert grew < 3 * len(body), f"peak grew by {grew / MiB:.0f} MiB for a {len(body) / MiB:.0f} MiB body"
    p = rk.assert_problem(r, 429)
    assert p["limit"] == "max_queued_jobs" and p["allowed"] == 100
    assert r.headers["retry-after"] == "30"
    counts = httpx.get(f"{heavy_jobs.base}/metrics", timeout=60).text
    assert 'tikhon_training_jobs{state="queued"} 103.0' in counts


def test_queued_jobs_are_limited_per_key(tmp_path, rk):
    settings = rk.base_settings(tmp_path, embedded_worker=False, log_level="warning", max_queued_jobs_per_key=2)
    store = rk.open_store(settings)
    _, secret_a = store.keys.create(["train"], "nightly retrain A")
    _, secret_b = store.keys.create(["train"], "nightly retrain B")
    store.close()
    with rk.server_process(tmp_path, **{k: v for k, v in settings.items() if k not in ("store", "data_dir")},
                           store=settings["store"], data_dir=settings["data_dir"]) as server:
        def submit(secret):
            return httpx.post(f"{server.base}/v1/models/pumps/trainings", json={"data": {"rows": QUICK_ROWS}, "spec": QUICK},
                              headers={"authorization": f"Bearer {secret}"}, timeout=60)

        assert [submit(secret_a).status_code for _ in range(2)] == [202, 202]
        r = submit(secret_a)
        p = rk.assert_problem(r, 429)
        assert p["limit"] == "max_queued_jobs_per_key" and p["allowed"] == 2 and p["received"] == 3
        assert int(r.headers["retry-after"]) == 30
        assert submit(secret_b).status_code == 202  # another key still has room
        jobs = httpx.get(f"{server.base}/v1/trainings", headers={"authorization": f"Bearer {secret_a}"}, timeout=60)
        assert [j["state"] for j in jobs.json()["trainings"]] == ["queued"] * 3


# ---------------------------------------------------------------------------------------------------
# 6. a small, fixed-size manifest; the CV table read lazily and in pages

BIG = "big-grid"
BIG_SPEC = {"target": "energy_kwh", "features": ["flow_lps", "head_m"],
            "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2, 3, 4, 5, 6]}],
            "penalty": {"kind": "l2", "strengths": {"min": 1e-6, "max": 1e4, "count": 10_000}},
            "cv": {"folds": 3, "seed": 8}}


@pytest.fixture(scope="module")
def big_cv(tmp_path_factory, rk):
    """A version whose CV table has 60,000 rows (6 basis settings x 10,000 strengths), and the same
    version written in the old format (format_version 1, the table inline in manifest.json)."""
    from service.engine import tune
    from service.store import artifact

    root = tmp_path_factory.mktemp("big-cv")
    settings = rk.base_settings(root, embedded_worker=False, log_level="warning")
    store = rk.open_store(settings)
    result = tune(rk.demo_rows(300, 9), BIG_SPEC)
    body, arrays = result.to_artifact()
    store.set_live(BIG, store.publish(BIG, body, arrays)["version"], actor="test", reason="fixture")
    saved = artifact.FORMAT_VERSION, getattr(artifact, "split_cv_table", None)
    artifact.FORMAT_VERSION, artifact.split_cv_table = 1, lambda rows: None  # as the old code wrote it
    try:
        store.publish(BIG, body, arrays)
    finally:
        artifact.FORMAT_VERSION, artifact.split_cv_table = saved
    manifest_bytes = [(Path(settings["store"]) / BIG / str(v) / "manifest.json").stat().st_size for v in (1, 2)]
    store.close()
    with rk.server_process(root, **{k: v for k, v in settings.items() if k not in ("store", "data_dir")},
                           store=settings["store"], data_dir=settings["data_dir"]) as server:
        httpx.get(f"{server.base}/v1/models/{BIG}/versions/1/cv", timeout=120)  # warm-up
        yield server, result, manifest_bytes


def test_model_metadata_does_not_read_the_cv_table(big_cv):
    server, result, manifest_bytes = big_cv
    assert manifest_bytes[0] < 64 * 1024 < 10 * 2**20 < manifest_bytes[1]  # new: small; old format: tens of MB
    grew, r = peak_growth(server.pid, lambda: httpx.get(f"{server.base}/v1/models/{BIG}", timeout=120))
    # the unbounded route parsed the whole manifest (the 60,000-row table) on every call
    assert grew < 20 * MiB, f"peak grew by {grew / MiB:.0f} MiB"
    assert r.status_code == 200
    live = r.json()["live_metadata"]
    assert live["chosen"] == result.chosen and "cv_table" not in live
    assert live["cv_summary"]["candidates"] == 60_000


def test_cv_route_answers_best_per_basis_and_pages(big_cv):
    server, result, _ = big_cv
    table = result.cv_table
    for version in (1, 2):  # the new format and the old (inline) one answer the same
        base = f"{server.base}/v1/models/{BIG}/versions/{version}/cv"
        grew, r = peak_growth(server.pid, lambda: httpx.get(base, timeout=120))
        assert r.status_code == 200 and r.json()["total"] == 60_000
        best = r.json()["table"]
        assert [row["basis"] for row in best] == [{"kind": "linear"}] + [{"kind": "polynomial", "degree": d}
                                                                         for d in (2, 3, 4, 5, 6)]
        for row in best:  # the best mean of its basis setting, found independently here
            mine = [t for t in table if t["basis"] == row["basis"]]
            assert row["mean"] == min(t["mean"] for t in mine)
            assert {k: v for k, v in row.items() if k != "row"} == table[row["row"]]
        page = httpx.get(base, params={"view": "all", "offset": 9_995, "limit": 10}, timeout=120).json()
        assert page["table"] == table[9_995:10_005]  # across the boundary of two basis settings
        assert page["links"]["next"].endswith("offset=10005&limit=10")
        last = httpx.get(base, params={"view": "all", "offset": 59_998, "limit": 10}, timeout=120).json()
        assert last["table"] == table[59_998:] and last["links"]["next"] is None
        if version == 1:
            assert grew < 60 * MiB, f"peak grew by {grew / MiB:.0f} MiB"


# ---------------------------------------------------------------------------------------------------
# 7. the cost of a job is estimated before it is accepted; a long setting reports progress inside


def test_a_job_whose_fits_are_costly_is_refused_before_it_is_queued(srv, rk):
    # Two fits (1 strength x 2 folds) of a 4,000-centre RBF basis on 20,000 rows: within the grid budget,
    # yet hours of a small host's time (QR of 10,000 x 4,000 per fold and a 4,000-wide factorization).
    rng = np.random.default_rng(11)
    csv = "flow_lps,head_m,energy_kwh\n" + "".join(
        f"{a:.4f},{b:.4f},{c:.4f}\n" for a, b, c in rng.uniform(1, 100, size=(20_000, 3)))
    spec = {"target": "energy_kwh", "features": ["flow_lps", "head_m"],
            "bases": [{"kind": "rbf", "widths": [1.0], "centers": 4_000}],
            "penalty": {"kind": "l2", "strengths": [1.0]}, "cv": {"folds": 2}}
    grew, r = peak_growth(srv.pid, lambda: httpx.post(
        f"{srv.base}/v1/models/{CAT}/trainings", json={"data": {"csv": csv}, "spec": spec}, timeout=300))
    assert grew < 60 * MiB, f"peak grew by {grew / MiB:.0f} MiB"  # no design, no k-means: refused from the shape
    p = rk.assert_problem(r, 422)
    assert p["limit"] == "max_job_cost" and p["allowed"] == 2e11 and p["received"] > 2e11
    assert "rbf width 1" in p["detail"] and "fewer RBF centres" in p["detail"]


def test_progress_moves_inside_a_long_basis_setting(monkeypatch, rk):
    import importlib

    tune_module = importlib.import_module("service.engine.tune")

    monkeypatch.setattr(tune_module, "PROGRESS_DETAIL_FLOPS", 0.0)  # treat this small job as a long one
    rows = _wide_rows(60_000, 12)
    spec = {"target": "y", "features": WIDE_FEATURES[:3], "bases": [{"kind": "polynomial", "degrees": [2]}],
            "penalty": {"kind": "l2", "strengths": [1.0]}, "cv": {"folds": 3, "seed": 1}}
    # one basis setting, 3 splits: 300 sub-units; each fold's 20,000 rows are summarized in two row blocks
    # (16,384 + 3,616), the exact way or by Gram matrices; then the short scoring (one list of tasks) moves
    # after each split's fit and after the fit on all rows: 10 moves before the setting ends
    for gram_min_rows, moves in ((10 ** 9, 10), (tune_module.GRAM_MIN_ROWS, 10)):
        monkeypatch.setattr(tune_module, "GRAM_MIN_ROWS", gram_min_rows)
        seen: list[tuple[int, int]] = []
        result = tune_module.tune(rows, spec, progress=lambda done, total: seen.append((done, total)))
        assert seen[-1] == (300, 300)
        inside = [d for d, _ in seen[:-1]]
        assert inside == sorted(inside) and len(set(inside)) == moves and max(inside) < 300
        # the numbers are those of the same job without progress reports
        assert result.cv_table == tune_module.tune(rows, spec).cv_table


# ---------------------------------------------------------------------------------------------------
# 2b. the streamed path counts levels too (a source read out of core, in row batches)

def _level_table(n: int, levels: int, seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    site = np.array([f"s{i % levels:05d}" for i in range(n)], dtype=object)
    return {"site": site, "flow_lps": rng.uniform(10, 90, n), "energy_kwh": rng.uniform(50, 400, n)}


def _write_parts(folder: Path, cols: dict[str, np.ndarray], files: int) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    folder.mkdir(parents=True, exist_ok=True)
    n = len(next(iter(cols.values())))
    cuts = np.linspace(0, n, files + 1).astype(int)
    for i in range(files):
        pq.write_table(pa.table({k: v[cuts[i]:cuts[i + 1]] for k, v in cols.items()}), folder / f"part-{i}.parquet")


LEVEL_SPEC = {"target": "energy_kwh", "features": ["flow_lps"], "categorical": ["site"], "bases": [{"kind": "linear"}],
              "penalty": {"kind": "l2", "strengths": [1.0]}, "cv": {"folds": 3, "seed": 1, "assignment": "hash"}}


@pytest.fixture
def no_one_hot(monkeypatch):
    """Any one-hot expansion fails the test: the refusal must come before it."""
    from service.engine import basis

    def refuse(self, *a, **kw):
        raise AssertionError("a one-hot block was built")

    monkeypatch.setattr(basis.Categories, "encode", refuse)


def test_a_streamed_source_over_the_level_limit_is_refused_like_the_in_memory_path(tmp_path, no_one_hot):
    from service.engine.streaming import tune_partitions
    from service.engine.tune import Budget, prepare
    from service.engine import parse_spec
    from service.errors import BudgetExceeded
    from service.sources import open_source

    # three files of 600 rows, 400 levels each (1,200 in all): every file is under the limit of 1,000, the
    # source is not, so only the count over all partitions can tell
    cols = _level_table(1_800, 1_200, seed=3)
    cols["site"] = np.array([f"s{i:05d}" for i in range(1_800)], dtype=object)
    cols["site"][1_200:] = cols["site"][:600]  # 1,200 distinct labels over 1,800 rows
    _write_parts(tmp_path / "src", cols, files=3)
    schema, parts = open_source(tmp_path / "src")
    with pytest.raises(BudgetExceeded) as streamed:
        tune_partitions(parts, schema, LEVEL_SPEC, budget=Budget())
    with pytest.raises(BudgetExceeded) as in_memory:
        prepare(cols, parse_spec(LEVEL_SPEC), Budget())
    # the same problem: same message (column and count), same field error and limit members
    assert str(streamed.value) == str(in_memory.value)
    assert streamed.value.errors == in_memory.value.errors == [
        {"field": "categorical", "value": "site", "message": "1200 levels"}]
    assert streamed.value.extra == in_memory.value.extra == {"limit": "max_levels", "allowed": 1_000, "received": 1_200}


def test_a_streamed_scan_stops_at_the_first_batch_past_the_level_limit(tmp_path, no_one_hot):
    from service.engine.streaming import tune_partitions
    from service.engine.tune import Budget
    from service.errors import BudgetExceeded
    from service.sources import open_source

    # one file, a new level on each of 50,000 rows, read in batches of 2,000 rows: the scan stops after the
    # first batch that passes 1,000 levels (here the first: 2,000 levels) instead of collecting 50,000 labels
    cols = _level_table(50_000, 50_000, seed=4)
    _write_parts(tmp_path / "wide", cols, files=1)
    schema, parts = open_source(tmp_path / "wide")
    spec = {**LEVEL_SPEC, "execution": {"batch_rows": 2_000}}
    with pytest.raises(BudgetExceeded) as err:
        tune_partitions(parts, schema, spec, budget=Budget())
    assert err.value.extra == {"limit": "max_levels", "allowed": 1_000, "received": 2_000}
    assert "'site'" in err.value.detail and "at least 2,000 distinct levels" in err.value.detail
    assert "first 2,000 rows read" in err.value.detail


def test_a_streamed_job_uses_the_servers_level_limit(tmp_path, live_service):
    import time

    from service.problems import problem_from_error
    from service.engine import parse_spec
    from service.engine.tune import Budget, prepare
    from service.errors import BudgetExceeded

    # 80 levels (40 in each of the two files): under the default 1,000, over this server's 50
    cols = _level_table(900, 80, seed=5)
    cols["site"] = np.array([f"s{(i // 450) * 40 + i % 40:05d}" for i in range(900)], dtype=object)
    with live_service(tmp_path, worker=True, max_levels=50) as (base, store, settings):
        _write_parts(settings.data_dir / "levels", cols, files=2)
        r = httpx.post(f"{base}/v1/models/levels/trainings", timeout=60,
                       json={"data": {"source": "levels"}, "spec": {**LEVEL_SPEC, "execution": {"mode": "streaming"}}})
        assert r.status_code == 202, r.text
        end = time.monotonic() + 300
        while (job := httpx.get(f"{base}/v1/trainings/{r.json()['id']}").json())["state"] not in (
                "succeeded", "failed", "cancelled"):
            assert time.monotonic() < end, job  # a readiness wait, not a timing check
            time.sleep(0.05)
    assert job["state"] == "failed", job
    with pytest.raises(BudgetExceeded) as in_memory:
        prepare(cols, parse_spec(LEVEL_SPEC), Budget(max_levels=50))
    want = problem_from_error(in_memory.value)
    got = job["problem"]
    assert got["status"] == want["status"] == 422
    for k in ("type", "title", "detail", "errors", "limit", "allowed", "received"):
        assert got[k] == want[k], k
    assert got["received"] == 80 and got["allowed"] == 50 and "'site'" in got["detail"]


# ---------------------------------------------------------------------------------------------------
# 7b. progress moves at every heartbeat, even inside one basis setting


def test_progress_moves_at_every_heartbeat_while_one_basis_setting_runs(tmp_path, live_service, monkeypatch):
    import time

    import pyarrow as pa
    import pyarrow.parquet as pq

    # One basis setting (degree 3 of 8 inputs: 165 terms) over 40,000 rows: it lasts many heartbeats of
    # 50 ms, and much of that time is inside single LAPACK calls that report nothing.
    cols = _wide_rows(40_000, 21)
    spec = {"target": "y", "features": WIDE_FEATURES, "bases": [{"kind": "polynomial", "degrees": [3]}],
            "penalty": {"kind": "l2", "strengths": [1.0]}, "cv": {"folds": 3, "seed": 1}}
    with live_service(tmp_path, worker=True, worker_heartbeat_s=0.05) as (base, store, settings):
        pq.write_table(pa.table(cols), settings.data_dir / "wide.parquet")
        beats: list[tuple[int, int | None]] = []
        real = store.jobs.heartbeat

        def spy(job_id, worker_id, progress):
            beats.append((progress["done"], progress["total"]))
            return real(job_id, worker_id, progress)

        monkeypatch.setattr(store.jobs, "heartbeat", spy)
        r = httpx.post(f"{base}/v1/models/paced/trainings", timeout=60,
                       json={"data": {"source": "wide.parquet"}, "spec": {**spec, "execution": {"mode": "memory"}}})
        assert r.status_code == 202, r.text
        end = time.monotonic() + 600
        while (job := httpx.get(f"{base}/v1/trainings/{r.json()['id']}").json())["state"] not in (
                "succeeded", "failed", "cancelled"):
            assert time.monotonic() < end, job  # a readiness wait, not a timing check
            time.sleep(0.05)
    assert job["state"] == "succeeded", job
    total = job["progress"]["total"]
    assert total == 3 * 1_000 and job["progress"]["done"] == total  # 3 splits x 1,000 sub-units, one setting
    # the heartbeats from the first that shows the setting under way to the setting's end
    inside = [d for d, t in beats if t == total and 0 < d < total]
    assert len(inside) >= 5, beats  # several heartbeats passed inside the one setting
    assert all(b > a for a, b in zip(inside, inside[1:])), beats  # and each one moved the progress
    assert beats[-1] == (total, total)
