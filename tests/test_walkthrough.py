"""Every ```sh block of the README's walkthrough, run against a live ``cuebank serve``.

The blocks come from the "Walkthrough" section of README.md, or of WALKTHROUGH.md while the
README does not have that section yet. The server is a real ``cuebank serve`` process on a free
port over a temporary data directory holding the demo collection, and the commands run through
bash with the venv's ``cuebank`` console script first on PATH, as a reader would run them.
"""

from __future__ import annotations

import csv
import os
import re
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from service.recall.auth import KeyService, load_pepper
from service.recall.service import DEFAULT_TEAM
from service.settings import Settings
from service.storage.db import make_engine, make_session_factory

ROOT = Path(__file__).resolve().parents[1]
BIN = Path(sys.executable).parent
CUEBANK = BIN / "cuebank"
SECTION = "Walkthrough"


def walkthrough_text() -> str:
    for name in ("README.md", "WALKTHROUGH.md"):
        path = ROOT / name
        if path.exists():
            text = path.read_text(encoding="utf-8")
            match = re.search(rf"^## {SECTION}\n(.*?)(?=^## |\Z)", text, flags=re.M | re.S)
            if match:
                return match.group(1)
    raise AssertionError(f"neither README.md nor WALKTHROUGH.md has a '## {SECTION}' section")


def sh_blocks() -> list[str]:
    return re.findall(r"^```sh\n(.*?)^```", walkthrough_text(), flags=re.M | re.S)


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port: int = sock.getsockname()[1]
        return port


def _demo_key(data_dir: Path) -> str:
    settings = Settings(data_dir=data_dir)
    engine = make_engine(settings.resolved_database_url)
    try:
        keys = KeyService(settings, make_session_factory(engine), load_pepper(settings))
        keys.ensure_team(DEFAULT_TEAM)
        _, secret = keys.create_key(DEFAULT_TEAM, ["read", "write", "admin"], label="walkthrough")
        return secret
    finally:
        engine.dispose()


@pytest.fixture
def served(tmp_path: Path) -> Iterator[dict[str, str]]:
    """A ``cuebank serve`` process with the demo loaded; yields the walkthrough's environment."""
    if not CUEBANK.exists():
        pytest.skip(f"no cuebank console script beside {sys.executable}")
    data_dir = tmp_path / "data"
    env = {
        **os.environ,
        "PATH": f"{BIN}{os.pathsep}{os.environ.get('PATH', '')}",
        "CUEBANK_DATA_DIR": str(data_dir),
    }
    env.pop("CUEBANK_DATABASE_URL", None)
    prepared = subprocess.run(
        [str(CUEBANK), "demo", "--no-serve"], env=env, capture_output=True, text=True, timeout=300
    )
    assert prepared.returncode == 0, prepared.stderr
    port = _free_port()
    url = f"http://127.0.0.1:{port}"
    server = subprocess.Popen(
        [str(CUEBANK), "serve", "--port", str(port)],
        env={**env, "CUEBANK_LOG_LEVEL": "WARNING"},
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        deadline = time.monotonic() + 60
        while True:
            assert server.poll() is None, "cuebank serve stopped during startup"
            try:
                if httpx.get(f"{url}/healthz", timeout=1).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            assert time.monotonic() < deadline, "cuebank serve did not answer in 60 s"
            time.sleep(0.1)
        yield {**env, "CUEBANK_URL": url, "CUEBANK_KEY": _demo_key(data_dir)}
    finally:
        server.terminate()
        server.wait(timeout=30)


def test_the_walkthrough_has_a_block_for_each_step() -> None:
    joined = "\n".join(sh_blocks())
    for command in ("collection create", "import ", "recall ", "reconcile ", "capacity "):
        assert f"cuebank {command}" in joined, command


@pytest.mark.slow
def test_every_walkthrough_block_runs_and_says_what_the_text_says(
    served: dict[str, str], tmp_path: Path
) -> None:
    work = tmp_path / "work"
    work.mkdir()
    outputs = []
    for block in sh_blocks():
        ran = subprocess.run(
            ["bash", "-euo", "pipefail", "-c", block],
            cwd=work,
            env=served,
            capture_output=True,
            text=True,
            timeout=300,
        )
        assert ran.returncode == 0, f"{block}\n--- stderr:\n{ran.stderr}"
        outputs.append(ran.stdout)
    text = "\n".join(outputs)
    assert "created collection 'registry'" in text
    assert "imported 1500 rows into 'registry'" in text
    # The smudged label of step 3, recalled to the specimen the text names.
    assert re.search(r"^verdict\s+recalled", text, flags=re.M)
    assert "SMP-2020-00044" in text
    with (work / "verdicts.csv").open(encoding="utf-8", newline="") as result:
        rows = list(csv.DictReader(result))
    assert [r["ref"] for r in rows] == [
        "box 7, label 1",
        "box 7, label 2",
        "box 7, label 3",
        'box 7, label 4 "torn"',
    ]
    assert rows[0]["matched_key"] == "SMP-2020-00044"
    assert rows[3]["verdict"] == "spurious"
    assert "recommended rule" in text
