"""Schema fuzzing: schemathesis generates requests from the live OpenAPI document of a real server.

The server is ``service.api.server.run`` in its own process on a loopback port, with a demo model and
API keys. Every operation of ``/openapi.json`` is fuzzed in four passes: schema-valid requests with an
admin key (path names pinned to the demo model, so predictions reach a real model), the same with
names generated freely, schema-violating ("negative") requests with the admin key, and schema-valid
requests with no key at all. For every response:

* no 5xx, ever;
* the response conforms to the document: its status code is documented, its content type is one the
  document lists for that status, and its body validates against the documented schema (schemathesis's
  ``status_code_conformance``, ``content_type_conformance`` and ``response_schema_conformance`` checks);
* every 4xx is ``application/problem+json`` with the members RFC 9457 section 3.1 defines.

Failures are collected (with a curl command that replays each) and reported together, so one run shows
all of them. Generation is derandomized (fixed seeds), so a failure replays. The case count is at least 200 in the
README's test command and at least 1,000 under ``TIKHON_CI_FULL=1`` or ``-m slow``; the count actually run is
asserted and printed.
"""

from __future__ import annotations

import math

import httpx
import pytest

pytestmark = pytest.mark.slow

# Aimed-at case counts, and the least that must have run. Hypothesis stops early on an operation whose
# input space it has exhausted (a GET without parameters), so the aim is above the minimum.
SHORT_AIM, SHORT_MIN = 240, 200
FULL_AIM, FULL_MIN = 1500, 1000


@pytest.fixture(scope="module")
def fuzz_server(tmp_path_factory, rk):
    root = tmp_path_factory.mktemp("fuzz")
    settings = rk.base_settings(root, embedded_worker=False, log_level="warning")
    store = rk.open_store(settings)
    rk.publish_demo(store, "pumps", n=300, seed=1)
    _, admin = store.keys.create(["admin"], "fuzz admin")
    store.close()
    with rk.server_process(root, **{k: v for k, v in settings.items()}) as server:
        yield server, admin


def _operations(schema):
    ops = []
    for result in schema.get_all_operations():
        ops.append(result.ok())
    return ops


def test_schema_fuzzing_finds_no_5xx_and_no_nonconforming_response(fuzz_server, full, rk):
    import schemathesis
    from hypothesis import HealthCheck, Phase, given, settings as hsettings
    from hypothesis.errors import Unsatisfiable
    from schemathesis.checks import not_a_server_error
    from schemathesis.specs.openapi.checks import (
        content_type_conformance, response_schema_conformance, status_code_conformance)

    server, admin = fuzz_server
    schema = schemathesis.openapi.from_url(f"{server.base}/openapi.json")
    operations = _operations(schema)
    assert len(operations) >= 20, [op.label for op in operations]
    auth = {"Authorization": f"Bearer {admin}"}
    passes = [
        ("admin key, valid, demo model", schemathesis.GenerationMode.POSITIVE, auth, True),
        ("admin key, valid", schemathesis.GenerationMode.POSITIVE, auth, False),
        ("admin key, invalid", schemathesis.GenerationMode.NEGATIVE, auth, False),
        ("no key, valid", schemathesis.GenerationMode.POSITIVE, {}, False),
    ]
    target, minimum = (FULL_AIM, FULL_MIN) if full else (SHORT_AIM, SHORT_MIN)
    per_op = max(2, math.ceil(target / (len(operations) * len(passes))))
    checks = [not_a_server_error, status_code_conformance, content_type_conformance, response_schema_conformance]
    ran: list[int] = []
    statuses: dict[int, int] = {}
    failures: list[str] = []

    def record(case, response, what: str) -> None:
        if len(failures) < 200:
            failures.append(f"{case.operation.label} -> {response.status_code}: {what}\n  {case.as_curl_command()}")

    for label, mode, headers, pin in passes:
        for op in operations:
            params = {p.name for p in op.path_parameters} if hasattr(op, "path_parameters") else set()
            pinned = {}
            if pin and "name" in params:
                pinned["name"] = "pumps"
            if pin and "version" in params:
                pinned["version"] = 1
            try:
                strategy = op.as_strategy(generation_mode=mode, path_parameters=pinned or None)
            except Exception as exc:  # an operation with nothing to negate, for instance
                if mode is schemathesis.GenerationMode.NEGATIVE:
                    continue
                raise AssertionError(f"{op.label}: no strategy ({exc})") from exc

            @hsettings(max_examples=per_op, deadline=None, derandomize=True, database=None,
                       phases=[Phase.explicit, Phase.generate],
                       suppress_health_check=list(HealthCheck))
            @given(case=strategy)
            def run(case):
                response = case.call(headers=headers, timeout=60)
                ran.append(1)
                statuses[response.status_code] = statuses.get(response.status_code, 0) + 1
                if response.status_code >= 400:
                    ctype = response.headers.get("content-type") or [""]
                    ctype = (ctype[0] if isinstance(ctype, list) else ctype).split(";")[0]
                    if ctype != "application/problem+json":
                        record(case, response, f"error with content type {ctype!r}")
                    else:
                        body = response.json()
                        if not (isinstance(body, dict) and body.get("status") == response.status_code
                                and body.get("title") and body.get("detail") and body.get("type")):
                            record(case, response, f"incomplete problem object {body!r:.300}")
                try:
                    case.validate_response(response, checks=checks)
                except BaseExceptionGroup as exc:  # schemathesis's FailureGroup lists every failed check
                    record(case, response, f"[{label}] " + "; ".join(
                        " ".join(str(e).split())[:400] for e in exc.exceptions))

            try:
                run()
            except Unsatisfiable:
                # negative mode on an operation with nothing that can be made invalid (no parameters and
                # no body): there is no case to generate; positive mode must always produce cases
                if mode is not schemathesis.GenerationMode.NEGATIVE:
                    raise

    total = len(ran)
    print(f"\nfuzzed cases: {total} over {len(operations)} operations x {len(passes)} passes; "
          f"statuses: {dict(sorted(statuses.items()))}; failures: {len(failures)}")
    assert total >= minimum, total
    assert all(s < 500 for s in statuses), statuses
    assert failures == [], f"{len(failures)} non-conforming responses:\n" + "\n".join(failures[:40])
    assert httpx.get(f"{server.base}/healthz", timeout=60).status_code == 200 and server.alive()
