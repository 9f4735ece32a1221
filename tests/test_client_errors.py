"""The client's exception tree: drawn in its module docstring, raised by kind of failure, and told apart
by type (never by title) in the command line's exit codes.

The answers come from an in-process ``httpx.MockTransport`` (httpx's own test transport), so each kind of
failure is produced exactly: a problem answer per status class, a body that is not JSON, no answer at all.
"""

from __future__ import annotations

import inspect
import re

import httpx
import pytest

from service import cli, client
from service.client import (
    AnswerTimeout,
    Client,
    ClientProblem,
    ConnectionFailed,
    InvalidArgument,
    ProblemAnswer,
    ServerProblem,
    ServiceError,
    UnexpectedAnswer,
    WaitTimeout,
)


def drawn_tree() -> dict[str, str]:
    """Class name -> parent name, as the module docstring draws it (the column of a name is its depth)."""
    parents: dict[str, str] = {}
    stack: list[tuple[int, str]] = []
    for line in client.__doc__.splitlines():
        m = re.match(r"([ │├└─]*)([A-Z][A-Za-z]+)(\s{2,}|$)", line)
        if not m or not line.startswith("    "):
            continue
        col, name = len(m.group(1)), m.group(2)
        while stack and stack[-1][0] >= col:
            stack.pop()
        parents[name] = stack[-1][1] if stack else "-"
        stack.append((col, name))
    return parents


def test_the_docstring_draws_every_exception_of_the_module_with_its_real_parent():
    classes = {name: cls for name, cls in vars(client).items()
               if inspect.isclass(cls) and issubclass(cls, Exception) and cls.__module__ == client.__name__}
    tree = drawn_tree()
    assert set(classes) <= set(tree), sorted(set(classes) - set(tree))
    for name, cls in classes.items():
        parent = tree[name]
        assert cls.__bases__[0].__name__ == ("Exception" if parent == "-" else parent), name
    assert tree["ValueError"] == "-" and tree["InvalidArgument"] == "ValueError"


def _client(handler) -> Client:
    return Client("http://tikhon.test", transport=httpx.MockTransport(handler))


def _problem(status: int, slug: str, title: str):
    return lambda request: httpx.Response(status, json={"type": f"/problems/{slug}", "title": title, "status": status,
                                                        "detail": f"{title} here.", "request_id": "r1"})


@pytest.mark.parametrize("handler,kind,status", [
    (_problem(404, "not-found", "Not found"), ClientProblem, 404),
    (_problem(429, "busy", "Busy"), ClientProblem, 429),
    (_problem(503, "catalog-unavailable", "Catalog unavailable"), ServerProblem, 503),
    (_problem(500, "internal-error", "Internal error"), ServerProblem, 500),
    (lambda request: httpx.Response(502, text="<html>bad gateway</html>"), ServerProblem, 502),  # a proxy's page
    (lambda request: httpx.Response(200, text="<html>not the API</html>"), UnexpectedAnswer, 200),
])
def test_each_answer_raises_its_kind(handler, kind, status):
    with _client(handler) as tk, pytest.raises(ServiceError) as err:
        tk.models()
    assert type(err.value) is kind and err.value.status == status
    assert isinstance(err.value, ProblemAnswer) == (kind in (ClientProblem, ServerProblem))
    assert "\n" not in str(err.value)


def test_no_answer_is_a_connection_failure_and_a_slow_one_its_timeout():
    def refused(request):
        raise httpx.ConnectError("connection refused", request=request)

    def slow(request):
        raise httpx.ReadTimeout("timed out", request=request)

    with _client(refused) as tk, pytest.raises(ConnectionFailed) as err:
        tk.health()
    assert type(err.value) is ConnectionFailed and err.value.status == 0 and "tikhon.test" in err.value.detail
    with _client(slow) as tk, pytest.raises(AnswerTimeout) as err:
        tk.health()
    assert isinstance(err.value, ConnectionFailed) and "client timeout" in err.value.detail


def test_a_wait_that_gives_up_is_its_own_kind():
    job = {"id": "a" * 32, "state": "running", "progress": {"done": 1, "total": 9}}
    with _client(lambda request: httpx.Response(200, json=job)) as tk, pytest.raises(WaitTimeout) as err:
        tk.wait(job, timeout=0.0, poll=0.01)
    assert "did not end within 0 s" in err.value.detail and err.value.status == 0


def test_caller_mistakes_are_value_errors_and_nothing_is_sent(tmp_path):
    sent = []

    def record(request):
        sent.append(request)
        return httpx.Response(200, json={})

    with _client(record) as tk:
        for call in (lambda: tk.train("m", rows=[{"a": 1}], csv="a\n1\n", spec={"target": "a"}),
                     lambda: tk.train("m", file=tmp_path / "missing.csv", spec={"target": "a"}),
                     lambda: tk.version("m", "two")):
            with pytest.raises(ValueError) as err:
                call()
            assert isinstance(err.value, InvalidArgument) and not isinstance(err.value, ServiceError)
    assert sent == []
    with pytest.raises(InvalidArgument, match="lacks its scheme"):
        Client("127.0.0.1:8000")


@pytest.mark.parametrize("exc,code", [
    (ClientProblem(422, "Invalid spec", "target: no column 'energy'."), 2),
    (ClientProblem(404, "Not found", "no model named 'x' exists."), 2),
    (ServerProblem(503, "Catalog unavailable", "the catalog does not answer."), 1),
    # the old rule compared titles: a server failure titled like a caller mistake must still exit 1
    (ServerProblem(500, "Invalid argument", "the server failed."), 1),
    (ConnectionFailed("Unreachable", "cannot reach the Tikhon server at http://127.0.0.1:1."), 1),
    (WaitTimeout("training job x did not end within 5 s."), 1),
])
def test_the_command_line_tells_the_kinds_apart_by_type(exc, code, capsys):
    assert cli._fail_service(exc, []) == code
    assert capsys.readouterr().err.strip().startswith("tikhon: ")
