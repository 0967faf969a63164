"""The whole API fuzzed from its own OpenAPI document, in process.

Schemathesis generates requests for every operation (valid ones and deliberately broken ones)
and checks that the service never answers 5xx, and that each answer has a status code, media
type and body its operation documents. The app holds the seed collection under the name the
documented examples use, so explicit examples reach real data, not only 404s.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path
from typing import Any

import pytest
import schemathesis
from hypothesis import HealthCheck, Phase, settings
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from service.api.app import create_app
from service.settings import Settings

from .conftest import SEED, UNLIMITED

CHECKS = [
    not_a_server_error,
    status_code_conformance,
    content_type_conformance,
    response_schema_conformance,
]
# Enough to find the shapes that break an operation, few enough for the suite's time budget:
# about 20 operations × 20 examples. CUEBANK_FUZZ_EXAMPLES asks for a deeper run.
MAX_EXAMPLES = int(os.environ.get("CUEBANK_FUZZ_EXAMPLES", "20"))


# Import and reconciliation files are text: send what the generator drew as it is.
schemathesis.serializer.alias("application/x-ndjson", "text/plain")
schemathesis.serializer.alias("text/csv", "text/plain")

#: The document the cases are drawn from; the app under test serves the same one (built from
#: the same code), and answers the cases on a database of its own.
DOCUMENT = create_app(Settings(data_dir=Path("unused"))).openapi()
schema = schemathesis.openapi.from_dict(DOCUMENT)


def _seed(client: Any, headers: dict[str, str]) -> None:
    created = client.post("/v1/collections", json=SEED["collection"], headers=headers)
    assert created.status_code == 201, created.text
    for key, fields in SEED["memories"].items():
        r = client.put(
            f"/v1/collections/{SEED['collection']['name']}/memories/{key}",
            data=json.dumps({"fields": fields}),
            headers={**headers, "Content-Type": "application/json"},
        )
        assert r.status_code == 201, r.text


@pytest.fixture(scope="module")
def fuzzed(tmp_path_factory: pytest.TempPathFactory, migrated_template: Path) -> dict[str, Any]:
    data_dir = tmp_path_factory.mktemp("fuzz")
    shutil.copyfile(migrated_template, data_dir / "cuebank.sqlite3")
    app = create_app(
        Settings(
            data_dir=data_dir, max_body_bytes=64 * 1024, max_bulk_body_bytes=256 * 1024, **UNLIMITED
        )
    )
    client = schemathesis.python.asgi.get_client(app)
    with client:  # starts the app's lifespan; schemathesis keeps it running
        app.state.keys.ensure_team("default")
        _, secret = app.state.keys.create_key("default", ["read", "write", "admin"], label="fuzz")
        headers = {"Authorization": f"Bearer {secret}"}
        _seed(client, headers)
    return {"app": app, "headers": headers}


@pytest.mark.slow
@schema.parametrize()
@settings(
    max_examples=MAX_EXAMPLES,
    deadline=None,
    phases=[Phase.explicit, Phase.generate],
    suppress_health_check=list(HealthCheck),
    derandomize=True,
)
def test_every_operation_answers_as_documented(case: Any, fuzzed: dict[str, Any]) -> None:
    response = case.call_and_validate(headers=fuzzed["headers"], checks=CHECKS, app=fuzzed["app"])
    if case.method == "DELETE" and case.path == "/v1/collections/{name}":
        if response.status_code == 204:
            # Put the seed back, so the operations fuzzed after this one meet data again.
            with schemathesis.python.asgi.get_client(fuzzed["app"]) as client:
                client.delete(
                    f"/v1/collections/{SEED['collection']['name']}", headers=fuzzed["headers"]
                )
                _seed(client, fuzzed["headers"])
