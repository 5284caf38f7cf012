"""API fuzzing driven by our own OpenAPI document (Schemathesis): every documented operation gets
generated requests, each sent as every role (and anonymously); none may answer 5xx.

The instance holds an issued certificate (canned analysis, no MCMC) so that routes about
certificates meet real ids as well as made-up ones. No workers run: accepted uploads only queue.
``COLDCERT_FUZZ_EXAMPLES`` raises the number of examples per operation (default 4 here).
"""

from __future__ import annotations

import os

import pytest
import schemathesis
from hypothesis import HealthCheck, given, settings

from tests.hostile_support import draft, user
from tests.service_support import PEOPLE, make_lab

EXAMPLES = max(1, int(os.environ.get("COLDCERT_FUZZ_EXAMPLES", "60")) // 15)


@pytest.fixture(scope="module")
def fuzz_lab(tmp_path_factory):
    lab = make_lab(tmp_path_factory.mktemp("api-fuzz"))
    services = lab.services
    cert = draft(services, user(services, "olga"), 31, [("r.csv", b"time_s,current_A\n0,1\n")])
    services.archive.issue(cert, user(services, "arno"))
    yield lab
    services.storage.dispose()


@pytest.fixture(scope="module")
def api_schema(fuzz_lab):
    return schemathesis.openapi.from_wsgi("/api/openapi.json", fuzz_lab.app)


def _operation_labels() -> list[str]:
    from service.web.openapi import openapi_document

    schema = schemathesis.openapi.from_dict(openapi_document())
    return sorted(result.ok().label for result in schema.get_all_operations())


@pytest.mark.parametrize("label", _operation_labels())
def test_no_route_answers_5xx_to_any_role(api_schema, fuzz_lab, label):
    operation = api_schema.find_operation_by_label(label)
    failures = []

    @settings(
        max_examples=EXAMPLES,
        deadline=None,
        derandomize=True,
        database=None,
        suppress_health_check=list(HealthCheck),
    )
    @given(case=operation.as_strategy())
    def send(case):
        for who in [None, *PEOPLE]:
            headers = {k: v for k, v in (case.headers or {}).items() if k != "Authorization"}
            if who is not None:
                headers["Authorization"] = f"Bearer {fuzz_lab.tokens[who]}"
            response = case.call(headers=headers)
            if response.status_code >= 500:
                failures.append(f"{who or 'anonymous'} {case.formatted_path}: "
                                f"{response.status_code} {response.text[:200]}")

    send()
    assert not failures, f"{label}: {failures[:5]}"
