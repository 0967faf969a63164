"""deploy/ files parse and carry what the scaling guide says they do."""

from __future__ import annotations

import configparser
from pathlib import Path

import yaml

DEPLOY = Path(__file__).resolve().parents[1] / "deploy"


class TestComposeFile:
    def test_parses_as_yaml_with_two_workers_a_database_and_a_migration(self) -> None:
        doc = yaml.safe_load((DEPLOY / "compose.yaml").read_text())
        services = doc["services"]
        assert set(services) == {"db", "migrate", "api-1", "api-2"}
        assert services["db"]["image"].startswith("postgres:")
        for worker in ("api-1", "api-2"):
            assert services[worker]["depends_on"]["migrate"]["condition"] == (
                "service_completed_successfully"
            )
            assert services[worker]["build"]["dockerfile"] == "deploy/Containerfile"
        assert services["migrate"]["command"] == ["cuebank", "migrate"]

    def test_env_file_names_only_known_settings(self) -> None:
        from service.settings import Settings

        known = {f"CUEBANK_{name.upper()}" for name in Settings.model_fields}
        lines = (DEPLOY / "cuebank.env.example").read_text().splitlines()
        names = [ln.split("=", 1)[0] for ln in lines if ln and not ln.startswith("#")]
        cuebank = [n for n in names if n.startswith("CUEBANK_")]
        assert cuebank
        assert set(cuebank) <= known, set(cuebank) - known


class TestSystemdUnit:
    def test_has_the_expected_sections_and_keys(self) -> None:
        parser = configparser.ConfigParser(strict=False, interpolation=None)
        parser.optionxform = str  # type: ignore[assignment,method-assign]
        parser.read_string((DEPLOY / "cuebank.service").read_text())
        assert parser["Unit"]["Description"]
        service = parser["Service"]
        assert service["ExecStart"].endswith("cuebank serve")
        assert service["EnvironmentFile"] == "/etc/cuebank/cuebank.env"
        assert service["KillSignal"] == "SIGTERM"
        assert service["Restart"] == "on-failure"
        assert parser["Install"]["WantedBy"] == "multi-user.target"


class TestContainerfile:
    def test_installs_the_project_and_serves(self) -> None:
        text = (DEPLOY / "Containerfile").read_text()
        assert text.startswith("#")
        assert "FROM python:3.11" in text
        assert "pip install --no-cache-dir -e '.[postgres]'" in text
        assert 'CMD ["cuebank", "serve"]' in text
        assert "OPENBLAS_NUM_THREADS=1" in text
