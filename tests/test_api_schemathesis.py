"""Fuzzing the sizing API from its own OpenAPI document with schemathesis (issue 9).

Schemathesis reads ``/openapi.json`` of a real ``ratefit serve`` process (loopback,
with a token) and generates requests for every operation — valid ones from the schemas
and examples, and invalid ones (negative mode: wrong types, out-of-range numbers,
missing fields). Each answer is checked against the document (status code documented,
JSON body matching the response schema) and must never be a 5xx. The last test reads
the server's own request counter and asserts that not one 5xx was served in the run.

Bounded: ``EXAMPLES`` per operation and mode, with no deadline (the machine is shared).
"""

from __future__ import annotations

from collections.abc import Iterator

import httpx
import pytest
import schemathesis
from api_fixtures import ServeProcess, demo_keys, serve_process, write_store
from hypothesis import HealthCheck, given, settings
from hypothesis.errors import Unsatisfiable
from schemathesis import GenerationMode
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import response_schema_conformance, status_code_conformance

pytestmark = pytest.mark.slow

TOKEN = "schemathesis-run-token-91c2"  # invented
EXAMPLES = 100


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[ServeProcess]:
    work = tmp_path_factory.mktemp("schemathesis")
    # the documented example keys (shop/checkout/app …) exist, so valid requests reach the lookup
    write_store(work / "store", 0, keys=["shop/checkout/app", "shop/cart/app", *demo_keys(6)])
    with serve_process(work / "store", token=TOKEN, workdir=work, log_level="warning") as srv:
        yield srv


def _schema(server: ServeProcess) -> schemathesis.BaseSchema:
    doc = httpx.get(f"{server.base_url}/openapi.json", headers=server.headers, timeout=30).json()
    return schemathesis.openapi.from_dict(doc)


SEEN: dict[str, int] = {"requests": 0, "5xx": 0}
CHECKS = [not_a_server_error, status_code_conformance, response_schema_conformance]


# (schemathesis' pytest plugin does not run under this pytest; each operation's hypothesis
# strategy is driven directly instead — the same generation and the same checks)
@pytest.mark.parametrize("mode", [GenerationMode.POSITIVE, GenerationMode.NEGATIVE])
def test_no_5xx_and_answers_match_the_document(server: ServeProcess, mode: GenerationMode) -> None:
    schema = _schema(server)
    operations = [result.ok() for result in schema.get_all_operations()]
    assert len(operations) >= 8  # every route of API.md is in the document
    for operation in operations:
        checks = CHECKS if mode is GenerationMode.POSITIVE else [not_a_server_error]

        @given(case=operation.as_strategy(generation_mode=mode))
        @settings(max_examples=EXAMPLES, deadline=None, suppress_health_check=list(HealthCheck), derandomize=True)
        def run(case: schemathesis.Case) -> None:
            response = case.call(base_url=server.base_url, headers=server.headers)
            SEEN["requests"] += 1
            SEEN["5xx"] += response.status_code >= 500
            case.validate_response(response, checks=checks)

        try:
            run()
        except Unsatisfiable:
            # negative mode has nothing to break in an operation without parameters or body
            # (/healthz, /readyz, /metrics, /v1/models, /v1/reload)
            assert mode is GenerationMode.NEGATIVE and not _has_inputs(operation), operation.label
            continue
        RAN.add((mode.value, operation.label))
    demand_ops = {label for m, label in RAN if m == mode.value and "demand" in label}
    assert len(demand_ops) == 2, RAN  # both demand routes fuzzed in this mode


def _has_inputs(operation: object) -> bool:
    return bool(
        getattr(operation, "path_parameters", None)
        or getattr(operation, "query", None)
        or getattr(operation, "body", None)
    )


RAN: set[tuple[str, str]] = set()


def test_the_server_counted_no_5xx(server: ServeProcess) -> None:
    text = httpx.get(f"{server.base_url}/metrics", headers=server.headers, timeout=30).text
    answered = 0.0
    for line in text.splitlines():
        if line.startswith("ratefit_api_requests_total{"):
            status = line.split('status="', 1)[1].split('"', 1)[0]
            count = float(line.rsplit(" ", 1)[1])
            answered += count
            assert not status.startswith("5"), line
    print(f"\nschemathesis: {SEEN['requests']} requests generated, server answered {answered:.0f}, 5xx: {SEEN['5xx']}")
    assert SEEN["requests"] > 0 and SEEN["5xx"] == 0
