"""Prometheus metrics of one app instance.

Each app owns its own ``CollectorRegistry`` (not the process-global one), so tests and benchmarks can
build several apps in one process. ``GET /metrics`` renders it in the Prometheus text format.

Under ``tikhon serve --workers N`` (N >= 2) every API process writes its counters and histograms to
files in one private folder (prometheus_client's multiprocess mode: the supervisor sets
``PROMETHEUS_MULTIPROC_DIR`` for its children before they import prometheus_client), and a scrape
answered by any process sums the files of all processes, those of processes that died and were
replaced included, so counters never go down between scrapes whichever process answers.
"""

from __future__ import annotations

from typing import Any, Callable, Mapping

import time
from bisect import bisect_left

from prometheus_client import CollectorRegistry, Counter, Histogram, generate_latest, values
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, HistogramMetricFamily
from prometheus_client.utils import floatToGoString

from service.jobstates import STATES

# Latency buckets in seconds: dense below 50 ms where single-row predictions live.
_BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)


_HELP = {
    "requests": "HTTP requests by route template, method and status.",
    "latency": "HTTP request latency by route template and method.",
    "predictions": "Rows predicted, by model name and version.",
    "cache_hits": "Prediction requests served from an already loaded version.",
}


class _Tally:
    """The per-request counters of one process as plain Python numbers, turned into metric families when
    scraped: ``tikhon_http_requests``, ``tikhon_http_request_seconds``, ``tikhon_predictions`` and
    ``tikhon_model_cache_hits``, with the samples (``_total``, ``_bucket``, ``_count``, ``_sum``, ``_created``)
    prometheus_client's own Counter and Histogram give.

    Every request adds to them, and prometheus_client's values take a lock per increment (five per
    prediction); these are only ever changed on the event loop's thread (the request context, the prediction
    routes and the version cache's look-up all run there), so a dictionary and a list of integers per label
    set are enough. A scrape reads them as they stand, as it would prometheus_client's values."""

    _BOUNDS = [floatToGoString(b) for b in (*_BUCKETS, float("inf"))]

    def __init__(self) -> None:
        self.requests: dict[tuple[str, str, int], list] = {}  # (route, method, status) -> [count, created]
        self.latency: dict[tuple[str, str], list] = {}  # (route, method) -> [sum, created, per-bucket counts..., above]
        self.predictions: dict[tuple[str, int], list] = {}  # (model, version) -> [rows, created]
        self.hits = [0, time.time()]

    def observe_request(self, method: str, route: str, status: int, seconds: float) -> None:
        count = self.requests.get((route, method, status))
        if count is None:
            count = self.requests[(route, method, status)] = [0, time.time()]
        count[0] += 1
        hist = self.latency.get((route, method))
        if hist is None:
            hist = self.latency[(route, method)] = [0.0, time.time()] + [0] * len(self._BOUNDS)
        hist[0] += seconds
        hist[2 + bisect_left(_BUCKETS, seconds)] += 1  # the first bucket whose bound is >= seconds ("le")

    def count_predictions(self, model: str, version: int, rows: int) -> None:
        count = self.predictions.get((model, version))
        if count is None:
            count = self.predictions[(model, version)] = [0, time.time()]
        count[0] += rows

    def cache_hit(self) -> None:
        self.hits[0] += 1

    def collect(self):
        requests = CounterMetricFamily("tikhon_http_requests", _HELP["requests"], labels=["route", "method", "status"])
        for (route, method, status), (n, created) in list(self.requests.items()):
            requests.add_metric([route, method, str(status)], float(n), created=created)
        yield requests
        latency = HistogramMetricFamily("tikhon_http_request_seconds", _HELP["latency"], labels=["route", "method"])
        created_samples = []
        for (route, method), hist in list(self.latency.items()):
            total, created, counts = hist[0], hist[1], hist[2:]
            cumulative, buckets = 0, []
            for bound, c in zip(self._BOUNDS, counts):
                cumulative += c
                buckets.append((bound, float(cumulative)))
            latency.add_metric([route, method], buckets, sum_value=total)
            created_samples.append(({"route": route, "method": method}, created))
        yield latency
        if created_samples:  # as prometheus_client's Histogram: a _created gauge per label set
            created = GaugeMetricFamily("tikhon_http_request_seconds_created", _HELP["latency"], labels=["route", "method"])
            for labels, when in created_samples:
                created.add_metric([labels["route"], labels["method"]], when)
            yield created
        predictions = CounterMetricFamily("tikhon_predictions", _HELP["predictions"], labels=["model", "version"])
        for (model, version), (n, created) in list(self.predictions.items()):
            predictions.add_metric([model, str(version)], float(n), created=created)
        yield predictions
        hits = CounterMetricFamily("tikhon_model_cache_hits", _HELP["cache_hits"])
        hits.add_metric([], float(self.hits[0]), created=self.hits[1])
        yield hits


class _JobStates:
    """Collector that counts training jobs by state at scrape time (the catalog is the source of truth,
    so the figure is right across server replicas and standalone workers). ``count_jobs`` is one
    ``SELECT state, count(*) ... GROUP BY state`` over all jobs: a scrape never reads a job's body, so its
    cost does not grow with what callers put in their requests."""

    def __init__(self, count_jobs: Callable[[], Mapping[str, int]]):
        self._count_jobs = count_jobs

    def collect(self):
        family = GaugeMetricFamily("tikhon_training_jobs", "Training jobs in the catalog by state.", labels=["state"])
        try:
            tally = self._count_jobs()
        except Exception:  # an unreachable catalog must not break the scrape; /readyz reports it
            return
        for state in STATES:
            family.add_metric([state], tally.get(state, 0))
        yield family


class ApiMetrics:
    """The app's metrics. ``multiprocess_dir``: the folder shared by the processes of one server (see the
    module docstring); prometheus_client must already be in multiprocess mode for that same folder."""

    def __init__(self, multiprocess_dir: str | None = None) -> None:
        if multiprocess_dir is not None and values.ValueClass is values.MutexValue:
            raise RuntimeError(
                "multiprocess metrics need PROMETHEUS_MULTIPROC_DIR set before prometheus_client is imported; "
                "start the process through 'tikhon serve --workers N'."
            )
        self.multiprocess_dir = multiprocess_dir
        self._job_states = None
        self.registry = CollectorRegistry(auto_describe=True)
        if multiprocess_dir is None:  # one process: plain numbers, read when scraped
            tally = _Tally()
            self.registry.register(tally)
            self.observe_request = tally.observe_request  # type: ignore[method-assign]
            self.count_predictions = tally.count_predictions  # type: ignore[method-assign]
            self.cache_hit = tally.cache_hit  # type: ignore[method-assign]
        else:  # several processes: prometheus_client's values, kept in files every process's scrape sums
            self.requests = Counter("tikhon_http_requests", _HELP["requests"], ["route", "method", "status"],
                                    registry=self.registry)
            self.latency = Histogram("tikhon_http_request_seconds", _HELP["latency"], ["route", "method"],
                                     buckets=_BUCKETS, registry=self.registry)
            self.predictions = Counter("tikhon_predictions", _HELP["predictions"], ["model", "version"],
                                       registry=self.registry)
            self.cache_hits = Counter("tikhon_model_cache_hits", _HELP["cache_hits"], registry=self.registry)
        self.cache_misses = Counter(
            "tikhon_model_cache_misses", "Prediction requests that had to load a version from the store.",
            registry=self.registry,
        )
        self.stale_answers = Counter(
            "tikhon_catalog_stale_answers", "Answers given on the catalog's last answers while it did not answer "
            "(marked Tikhon-Catalog: stale).", registry=self.registry,
        )
        self._seen: dict[tuple[str, str, int], tuple] = {}
        self._predicted: dict[tuple[str, int], Any] = {}

    def watch_jobs(self, count_jobs: Callable[[], Mapping[str, int]]) -> None:
        """Register the job-state gauge; ``count_jobs()`` returns {state: count} over all jobs."""
        self._job_states = _JobStates(count_jobs)
        self.registry.register(self._job_states)

    # The three methods below are those of the several-processes case; with one process, __init__ puts the
    # tally's own methods in their place.
    def cache_hit(self) -> None:
        self.cache_hits.inc()

    def observe_request(self, method: str, route: str, status: int, seconds: float) -> None:
        key = (route, method, status)
        children = self._seen.get(key)
        if children is None:  # labels() costs a lock and a dict lookup; keep the children
            children = (self.requests.labels(route, method, str(status)), self.latency.labels(route, method))
            self._seen[key] = children
        children[0].inc()
        children[1].observe(seconds)

    def count_predictions(self, model: str, version: int, rows: int) -> None:
        child = self._predicted.get((model, version))
        if child is None:  # as in observe_request: keep the labelled child
            child = self.predictions.labels(model, str(version))
            self._predicted[(model, version)] = child
        child.inc(rows)

    def render(self) -> bytes:
        if self.multiprocess_dir is None:
            return generate_latest(self.registry)
        from prometheus_client.multiprocess import MultiProcessCollector

        # Every process's files, summed per label set; the job counts come from the catalog, once.
        merged = CollectorRegistry(auto_describe=False)
        MultiProcessCollector(merged, path=self.multiprocess_dir)
        if self._job_states is not None:
            merged.register(self._job_states)
        return generate_latest(merged)
