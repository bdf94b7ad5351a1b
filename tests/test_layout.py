"""The import contract of the layout (DEVELOPERS.md, "Layout"), checked by parsing imports.

* ``demur.serve`` never imports torch or ``demur.export`` (the runtime image has no torch);
* the pure core (``demur.serve.core``) imports no framework or server: no flask, werkzeug,
  onnxruntime, onnx, psycopg, gunicorn, prometheus_client, matplotlib;
* only the offline tools (``demur.serve.offline``) may import matplotlib, which lives in the
  ``offline`` extra, not the runtime;
* after install, the generic names ``serve`` and ``export`` are not importable: everything
  is under ``demur``; and importing every runtime module in a fresh interpreter loads no torch.
"""

from __future__ import annotations

import functools
import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SERVE = ROOT / "serve"

FRAMEWORKS = {"flask", "werkzeug", "onnxruntime", "onnx", "psycopg", "psycopg_pool", "gunicorn",
              "prometheus_client", "matplotlib", "httptools", "torch"}


def _module_name(path: Path) -> str:
    rel = path.relative_to(ROOT).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return "demur." + ".".join(parts)


_PARSE = """
import ast, json, sys
out = {}
for name in sys.argv[1:]:
    found = []
    for node in ast.walk(ast.parse(open(name).read(), filename=name)):
        if isinstance(node, ast.Import):
            found += [(a.name, 0) for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            found.append((node.module or "", node.level))
    out[name] = found
print(json.dumps(out))
"""


@functools.lru_cache(maxsize=1)
def _all_imports() -> dict[str, list[tuple[str, int]]]:
    """Every import statement of every serve/ file (function bodies included), parsed in a fresh
    interpreter: CPython 3.11.7's ast can raise a spurious SystemError ("AST constructor recursion
    depth mismatch", python/cpython#106905) in a process where other threads run, as they do here."""
    files = [str(p) for p in _serve_files()]
    out = subprocess.run([sys.executable, "-c", _PARSE, *files], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    return {k: [tuple(v) for v in vs] for k, vs in json.loads(out.stdout).items()}  # type: ignore[misc]


def _imports(path: Path) -> set[str]:
    """Every module name an import statement in ``path`` names; relative imports are refused."""
    found = set()
    for name, level in _all_imports()[str(path)]:
        assert level == 0, f"{path}: use absolute imports (from demur.serve... import)"
        found.add(name)
    return found


def _serve_files() -> list[Path]:
    return sorted(SERVE.rglob("*.py"))


def _top(name: str) -> str:
    return name.split(".")[0]


@pytest.mark.parametrize("path", _serve_files(), ids=lambda p: str(p.relative_to(ROOT)))
def test_serve_never_imports_torch_or_export(path: Path) -> None:
    bad = sorted(n for n in _imports(path)
                 if _top(n) in {"torch", "export", "serve"} or n.startswith("demur.export"))
    assert not bad, f"{path.relative_to(ROOT)} imports {bad}"


@pytest.mark.parametrize("path", sorted((SERVE / "core").rglob("*.py")), ids=lambda p: p.name)
def test_core_imports_no_framework(path: Path) -> None:
    bad = sorted(n for n in _imports(path) if _top(n) in FRAMEWORKS)
    assert not bad, f"serve/core/{path.name} imports {bad}: the core is plain numpy/stdlib"
    outside = sorted(n for n in _imports(path)
                     if n.startswith("demur.serve.") and not n.startswith(("demur.serve.core", "demur.serve.errors",
                                                                            "demur.serve.config")))
    assert not outside, f"serve/core/{path.name} imports adapters {outside}"


@pytest.mark.parametrize("path", _serve_files(), ids=lambda p: str(p.relative_to(ROOT)))
def test_matplotlib_only_offline(path: Path) -> None:
    if (SERVE / "offline") in path.parents:
        return
    assert "matplotlib" not in {_top(n) for n in _imports(path)}, path


def _fresh(code: str, cwd: Path) -> object:
    """Run ``code`` in a fresh interpreter (this test process already holds torch from the
    bundle fixtures) and return the JSON its last line prints."""
    out = subprocess.run([sys.executable, "-c", "import json, sys\n" + code], cwd=cwd, capture_output=True,
                         text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout.strip().splitlines()[-1])


LOADED = "sorted(m for m in sys.modules if m.split('.')[0] in {names} or m.startswith('demur.export'))"


def test_generic_names_are_not_importable_and_runtime_loads_no_torch(tmp_path: Path) -> None:
    """Run outside the checkout (the checkout itself is on sys.path when cwd is the root)."""
    names = [_module_name(p) for p in _serve_files()]
    got = _fresh("import importlib, importlib.util\n"
                 f"for name in {names!r}:\n"
                 "    importlib.import_module(name)\n"
                 "generic = [n for n in ('serve', 'export') if importlib.util.find_spec(n) is not None]\n"
                 f"print(json.dumps({{'bad': {LOADED.format(names=('torch', 'matplotlib'))}, 'generic': generic}}))\n",
                 tmp_path)
    assert got["generic"] == [], f"generic top-level names importable: {got['generic']}"  # type: ignore[index]
    assert got["bad"] == [], f"importing the runtime loaded {got['bad'][:5]}"  # type: ignore[index]


def test_gunicorn_master_never_loads_onnxruntime(tmp_path: Path) -> None:
    """gunicorn's master imports the worker class and the server module before forking, and
    parses ``demur serve``; a forked child whose parent had loaded onnxruntime aborts at exit
    (std::thread::join on a thread that did not survive the fork, seen here), and torch's
    thread pools would be inherited by every worker. So none of them may be loaded there."""
    got = _fresh("import demur.serve.web.loop.worker, demur.serve.web.server\n"
                 "from demur.serve.cli import build_parser\n"
                 "assert build_parser(only='serve').parse_args(['serve', 'b', '--port', '9000']).command == 'serve'\n"
                 f"print(json.dumps({LOADED.format(names=('onnxruntime', 'torch'))}))\n", tmp_path)
    assert got == []


def test_the_production_app_runs_without_torch(tiny_bundle_factory: object, tmp_path: Path) -> None:
    """Building the production app and answering a predict (what each gunicorn worker does)."""
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)  # type: ignore[operator]
    got = _fresh("from demur.serve.config import ServeConfig\n"
                 "from demur.serve.web.server import build_app\n"
                 f"app = build_app(ServeConfig(bundle={str(bundle.path)!r}, data_dir={str(tmp_path)!r}))\n"
                 "r = app.test_client().post('/v1/predict', json={'cases': [[1.0] * 64]})\n"
                 "assert r.status_code == 200, r.get_data()\n"
                 f"print(json.dumps({LOADED.format(names=('torch',))}))\n", tmp_path)
    assert got == []
