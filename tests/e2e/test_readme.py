"""Every curl example in the README's "Try it" section, run against a live demo server."""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from collections.abc import Callable
from pathlib import Path

import pytest

from service.cli import main

from .conftest import LiveServer, make_admin_key

README = Path(__file__).resolve().parents[2] / "README.md"
DEMO_URL = "http://127.0.0.1:8000"


def _section(text: str, title: str) -> str:
    start = text.index(f"## {title}\n")
    end = text.find("\n## ", start + 1)
    return text[start : end if end > 0 else len(text)]


def _curl_blocks() -> list[str]:
    section = _section(README.read_text(encoding="utf-8"), "Try it")
    blocks = re.findall(r"```sh\n(.*?)```", section, flags=re.S)
    return [b for b in blocks if b.lstrip().startswith("curl")]


def _demo_key(server: LiveServer) -> str:
    """An admin key of the demo team, made on the server's database as `cuebank demo` does."""
    return make_admin_key(server.data_dir)


@pytest.mark.slow
class TestReadmeTryIt:
    def test_the_readme_has_the_examples_this_test_runs(self) -> None:
        assert len(_curl_blocks()) == 3

    def test_every_curl_example_answers_as_the_readme_says(
        self, start_server: Callable[[], LiveServer]
    ) -> None:
        if shutil.which("curl") is None:
            pytest.skip("curl is not installed on this machine")
        server = start_server()
        server.stop()
        assert main(["demo", "--no-serve", "--data-dir", str(server.data_dir)]) == 0
        server.start()
        env = {**os.environ, "CUEBANK_KEY": _demo_key(server)}
        answers = []
        for block in _curl_blocks():
            command = block.replace(DEMO_URL, server.url)
            run = subprocess.run(
                ["bash", "-c", command],
                env=env,
                capture_output=True,
                text=True,
                timeout=120,
                check=False,
            )
            assert run.returncode == 0, run.stderr
            answers.append(json.loads(run.stdout))
        smudged, shared, capacity = answers
        assert smudged["verdict"] == "recalled"
        assert smudged["memory"]["key"] == "SMP-2022-00026"
        assert smudged["memory"]["fields"]["taxon"] == "Pelella virensis"
        assert (shared["verdict"], shared["reason"]) == ("spurious", "ambiguous")
        assert capacity["report"]["rule"] == "dense"
        assert capacity["report"]["n_memories"] == 1500
