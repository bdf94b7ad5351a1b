"""Building and running the runtime loads no torch (DEVELOPERS.md: the runtime image carries
no torch). Checked in a fresh interpreter: this test process already holds torch from the
bundle fixtures. The import contract itself is tests/test_layout.py."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def test_demur_serve_app_builds_without_torch(tiny_bundle_factory: object, tmp_path: Path) -> None:
    """Building the production app (what each gunicorn worker does) pulls in no torch either."""
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)  # type: ignore[operator]
    code = (
        "import json, sys\n"
        "from demur.serve.config import ServeConfig\n"
        "from demur.serve.web.server import build_app\n"
        f"app = build_app(ServeConfig(bundle={str(bundle.path)!r}, data_dir={str(tmp_path)!r}))\n"
        "r = app.test_client().post('/v1/predict', json={'cases': [[1.0] * 64]})\n"
        "assert r.status_code == 200, r.get_data()\n"
        "print(json.dumps(sorted(m for m in sys.modules if m.split('.')[0] in ('torch', 'export') or m.startswith('demur.export'))))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert json.loads(out.stdout.strip().splitlines()[-1]) == []


def test_demur_serve_command_line_does_not_load_torch() -> None:
    """The gunicorn master parses ``demur serve``; the torch-side commands (entry points)
    must not be imported there, or every forked worker inherits torch's thread pools."""
    code = (
        "import json, sys\n"
        "from demur.serve.cli import build_parser\n"
        "args = build_parser(only='serve').parse_args(['serve', 'b', '--port', '9000'])\n"
        "assert args.command == 'serve'\n"
        "print(json.dumps(sorted(m for m in sys.modules if m.split('.')[0] in ('torch', 'export') or m.startswith('demur.export'))))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert json.loads(out.stdout.strip().splitlines()[-1]) == []
