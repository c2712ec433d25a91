"""The calculation engine must not import Django (usable from the command line)."""

import ast
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
ENGINE = ROOT / "calcs" / "engine"


def test_import_in_fresh_interpreter_does_not_load_django():
    code = (
        "import sys\n"
        "import calcs.engine, calcs.engine.case, calcs.engine.design, calcs.engine.lopa\n"
        "import calcs.engine.sil, calcs.__main__\n"
        "assert 'django' not in sys.modules, sorted(m for m in sys.modules if 'django' in m)\n"
        "print('ok')\n"
    )
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    env.pop("DJANGO_SETTINGS_MODULE", None)
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, check=False, text=True, cwd=ROOT,
                          env=env, timeout=60)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "ok"


def test_no_django_import_statement_in_engine_sources():
    for path in sorted(ENGINE.glob("*.py")):
        tree = ast.parse(path.read_text(), filename=str(path))
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom):
                names = [node.module or ""]
            else:
                continue
            assert not any(n == "django" or n.startswith("django.") for n in names), (path, names)
