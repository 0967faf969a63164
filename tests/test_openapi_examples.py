"""Every example in openapi_examples/ fits its model and does what it says when sent."""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from typing import Any

import httpx
import pytest
from pydantic import BaseModel

from service.api import schemas
from service.api.app import create_app
from service.api.errors import all_problem_types
from service.api.examples import EXAMPLES_DIR, example_files, load_examples
from service.settings import Settings
from service.storage.migrate import upgrade_to_head

SEEDS = EXAMPLES_DIR / "seeds"


def _all_examples() -> list[Any]:
    out = []
    for path in example_files():
        model = json.loads(path.read_text(encoding="utf-8"))["model"]
        for name, example in load_examples(model).items():
            out.append(pytest.param(model, name, example, id=f"{model}:{name}"))
    return out


EXAMPLES = _all_examples()
SENDABLE = [p for p in EXAMPLES if "request" in p.values[2]]


def _model(name: str) -> type[BaseModel]:
    model = getattr(schemas, name, None)
    assert isinstance(model, type), f"no model {name}"
    assert issubclass(model, BaseModel), f"{name} is no pydantic model"
    return model


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


@pytest.fixture(scope="module")
def template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("examples-template") / "cuebank.sqlite3"
    upgrade_to_head(f"sqlite:///{path.as_posix()}")
    return path


class TestExampleFiles:
    def test_each_file_is_named_after_its_model(self) -> None:
        for path in example_files():
            assert json.loads(path.read_text(encoding="utf-8"))["model"] == path.stem

    @pytest.mark.parametrize(("model", "name", "example"), EXAMPLES)
    def test_example_validates_against_its_model(
        self, model: str, name: str, example: dict[str, Any]
    ) -> None:
        assert example.get("summary"), f"{model}:{name} needs a summary"
        _model(model).model_validate(example["value"])

    def test_problem_examples_use_known_types_and_statuses(self) -> None:
        known = all_problem_types()
        for name, example in load_examples("Problem").items():
            slug = example["value"]["type"].removeprefix("/problems/")
            assert slug in known, name
            if slug != "limit-exceeded":  # answered as 413 or 422 depending on the limit
                assert example["value"]["status"] == known[slug][1], name

    def test_every_request_body_and_main_response_has_examples(self, tmp_path: Path) -> None:
        doc = create_app(Settings(data_dir=tmp_path)).openapi()
        missing = []
        for path, item in doc["paths"].items():
            for method, op in item.items():
                content = op.get("requestBody", {}).get("content", {})
                for media, entry in content.items():
                    if not (entry.get("examples") or "example" in entry):
                        missing.append(f"{method} {path} request {media}")
                for status, response in op["responses"].items():
                    for media, entry in response.get("content", {}).items():
                        ref = entry.get("schema", {}).get("$ref", "")
                        if ref and not entry.get("examples"):
                            missing.append(f"{method} {path} {status} {media}")
        assert not missing, missing


class TestExamplesAgainstTheService:
    @pytest.mark.anyio
    @pytest.mark.parametrize(("model", "name", "example"), SENDABLE)
    async def test_example_gets_its_documented_status(
        self, model: str, name: str, example: dict[str, Any], template: Path, tmp_path: Path
    ) -> None:
        shutil.copyfile(template, tmp_path / "cuebank.sqlite3")
        app = create_app(Settings(data_dir=tmp_path))
        how = example["request"]
        async with app.router.lifespan_context(app):
            transport = httpx.ASGITransport(app=app)
            app.state.keys.ensure_team("default")
            _, secret = app.state.keys.create_key("default", ["read", "write", "admin"])
            headers = {"Authorization": f"Bearer {secret}"}
            async with httpx.AsyncClient(
                transport=transport, base_url="http://t", headers=headers
            ) as client:
                if how.get("seed"):
                    await _seed(client, how["seed"])
                r = await client.request(how["method"], how["path"], json=example["value"])
        assert r.status_code == how["status"], r.text
        if "response_model" in how:
            _model(how["response_model"]).model_validate(r.json())


async def _seed(client: httpx.AsyncClient, name: str) -> None:
    seed = json.loads((SEEDS / f"{name}.json").read_text(encoding="utf-8"))
    collection = seed["collection"]
    r = await client.post("/v1/collections", json=collection)
    assert r.status_code == 201, r.text
    for key, fields in seed["memories"].items():
        r = await client.put(
            f"/v1/collections/{collection['name']}/memories/{key}", json={"fields": fields}
        )
        assert r.status_code == 201, r.text
