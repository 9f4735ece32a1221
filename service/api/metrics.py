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

from prometheus_client import CollectorRegistry, Counter, Histogram, generate_latest, values
from prometheus_client.core import GaugeMetricFamily

from service.jobstates import STATES

# Latency buckets in seconds: dense below 50 ms where single-row predictions live.
_BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)



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
        self.requests = Counter(
            "tikhon_http_requests", "HTTP requests by route template, method and status.",
            ["route", "method", "status"], registry=self.registry,
        )
        self.latency = Histogram(
            "tikhon_http_request_seconds", "HTTP request latency by route template and method.",
            ["route", "method"], buckets=_BUCKETS, registry=self.registry,
        )
        self.predictions = Counter(
            "tikhon_predictions", "Rows predicted, by model name and version.", ["model", "version"],
            registry=self.registry,
        )
        self.cache_hits = Counter(
            "tikhon_model_cache_hits", "Prediction requests served from an already loaded version.", registry=self.registry
        )
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
