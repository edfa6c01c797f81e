"""Property-based fuzzing of the OpenAPI document (schemathesis, in-process): no 5xx.

schemathesis generates requests from ``/v1/openapi.json`` (parameters of every type and range,
bodies of every declared media type) and sends them to the app through its ASGI interface, with
an admin token so that every endpoint is reached past the access check. The number of examples
per operation is bounded to keep the run short.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
import schemathesis
from hypothesis import HealthCheck, given, settings

from fusion.service import create_app
from fusion.service.tokens import TokenBook
from fusion.settings import load_config
from tests.service.conftest import ServiceStore

pytestmark = [pytest.mark.slow, pytest.mark.filterwarnings("ignore::DeprecationWarning")]


def test_no_request_generated_from_the_openapi_document_gives_a_5xx(
    service_store: ServiceStore, tmp_path: Path
) -> None:
    root = tmp_path / "store"
    shutil.copytree(service_store.root, root)
    headers = {"Authorization": f"Bearer {TokenBook(root).add('fuzz', 'admin')}"}
    app = create_app(root, load_config(service_store.config))
    schema = schemathesis.openapi.from_asgi("/v1/openapi.json", app)
    failures: list[str] = []
    operations = 0
    for result in schema.get_all_operations():
        operation = result.ok()
        if operation.path == "/v1/updates":
            continue  # the event stream never ends; the browser test reads it

        @given(case=operation.as_strategy())
        @settings(
            max_examples=12,
            deadline=None,
            suppress_health_check=list(HealthCheck),
            derandomize=True,
            database=None,
        )
        def run(case) -> None:  # type: ignore[no-untyped-def]
            response = case.call(headers=headers)
            if response.status_code >= 500:
                failures.append(
                    f"{case.method} {case.formatted_path} {response.status_code}: "
                    f"{response.text[:200]}"
                )

        run()
        operations += 1
    assert operations >= 10
    assert failures == []
