"""Project-level checks: deploy settings, the compose file, the demo loader."""

import os
import subprocess
import sys
from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parent.parent


def test_production_settings_pass_check_deploy():
    env = {**os.environ, "DJANGO_SETTINGS_MODULE": "config.settings.production",
           "SECRET_KEY": "x" * 20 + "a-long-random-test-secret-value-0123456789",
           "CHAIN_KEY": "c" * 8 + "a-random-test-chain-key-0123456789",
           "ALLOWED_HOSTS": "ledger.example.invalid"}
    env.pop("DJANGO_ALLOW_ASYNC_UNSAFE", None)  # set only for the browser tests
    out = subprocess.run([sys.executable, "manage.py", "check", "--deploy", "--fail-level",
                          "WARNING"], cwd=ROOT, env=env, capture_output=True, text=True)
    assert out.returncode == 0, out.stdout + out.stderr


def test_production_settings_refuse_the_dev_secret():
    env = {**os.environ, "DJANGO_SETTINGS_MODULE": "config.settings.production",
           "ALLOWED_HOSTS": "ledger.example.invalid"}
    env.pop("SECRET_KEY", None)
    out = subprocess.run([sys.executable, "manage.py", "check"], cwd=ROOT, env=env,
                         capture_output=True, text=True)
    assert out.returncode != 0 and "SECRET_KEY" in out.stderr


def test_compose_file_validates_against_the_compose_specification():
    out = subprocess.run([sys.executable, "-m", "check_jsonschema", "--builtin-schema",
                          "vendor.compose-spec", str(ROOT / "docker-compose.yml")],
                         capture_output=True, text=True)
    assert out.returncode == 0, out.stdout + out.stderr


def test_compose_services_reference_only_defined_services_and_volumes():
    doc = yaml.safe_load((ROOT / "docker-compose.yml").read_text())
    services = doc["services"]
    assert {"db", "redis", "web", "worker", "beat"} <= set(services)
    for name, svc in services.items():
        for dep in svc.get("depends_on", {}):
            assert dep in services, f"{name} depends on undefined {dep}"
        for vol in svc.get("volumes", []):
            source = vol.split(":")[0]
            if not source.startswith((".", "/")):
                assert source in doc["volumes"], f"{name} uses undefined volume {source}"
    assert "gunicorn" in services["web"]["command"]
    assert "beat" in services["beat"]["command"]


def test_env_example_lists_every_variable_the_settings_read():
    """.env.example says it lists every variable the settings read: read the settings'
    own calls (env_str/env_bool/env_int/env_list) and hold the file to it, both ways."""
    import re

    root = Path(__file__).resolve().parent.parent
    read = set()
    for path in (root / "config" / "settings").glob("*.py"):
        read |= set(re.findall(r"env_(?:str|bool|int|list)\(\s*\"([A-Z0-9_]+)\"",
                               path.read_text()))
    listed = set(re.findall(r"^([A-Z0-9_]+)=", (root / ".env.example").read_text(), re.M))
    assert len(read) > 25, "the settings' variables should be found"
    assert read - listed == set(), f"read by the settings but not in .env.example: {read - listed}"
    compose_only = {"POSTGRES_PASSWORD"}  # read by docker-compose.yml, not by the settings
    assert listed - read - compose_only == set(), \
        f"in .env.example but read by nothing: {listed - read - compose_only}"
    assert "POSTGRES_PASSWORD" in (root / "docker-compose.yml").read_text()
