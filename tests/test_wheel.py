"""What users install is what is tested: the built wheel, in fresh virtualenvs outside the checkout.

An editable install (``make test``, ``make demo``) maps ``demur.serve`` onto the
checkout, so a package missing from pyproject.toml's list goes unseen there: once
``demur.serve.web.loop`` was missing and the installed server could not start. Here:

- the wheel is built once per session (``pip wheel --no-deps``) from a copy of exactly
  what deploy/Containerfile copies (pyproject.toml, README.md, serve/, export/), so
  nothing stale in the checkout's build/ can slip into it;
- **runtime**: a fresh virtualenv under the system temp directory, ``pip install
  'WHEEL[serve]'`` (dependencies from PyPI or pip's cache), then the container recipe's
  own check, deploy/runtime-check.sh (removes the torch side, proves torch absent,
  imports the front's worker); then ``demur serve`` on a small bundle on a free
  127.0.0.1 port: a 200 prediction and the reviewer page;
- **full**: the wheel with its torch side. Installing torch (hundreds of MB) into one
  more virtualenv costs minutes, so this virtualenv reaches the project's own
  third-party packages (torch 2.13.0 CPU included) through a ``.pth`` file naming the
  test environment's site-packages, and the wheel is installed with ``--no-deps``;
  demur itself comes from the wheel (checked by its path), then ``demur export --help``
  and ``demur calibrate --help`` must work.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import sysconfig
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
import requests

from tests.reliability.harness import Server, digit_body

pytestmark = [pytest.mark.slow]

ROOT = Path(__file__).resolve().parents[1]
PIP_TIMEOUT_S = 900


def _run(cmd: list[str], *, cwd: Path, timeout: float = PIP_TIMEOUT_S, check: bool = True,
         env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    clean = {k: v for k, v in os.environ.items() if not k.startswith(("DEMUR_", "PYTHON", "VIRTUAL_ENV"))}
    clean["PIP_DISABLE_PIP_VERSION_CHECK"] = "1"
    clean.update(env or {})
    done = subprocess.run(cmd, cwd=cwd, env=clean, capture_output=True, text=True, timeout=timeout)
    if check and done.returncode != 0:
        raise AssertionError(f"{' '.join(cmd)} exited {done.returncode}:\n{done.stdout[-3000:]}\n{done.stderr[-3000:]}")
    return done


def _venv(path: Path) -> Path:
    """A fresh virtualenv at ``path`` (outside the checkout), on this Python's base interpreter."""
    assert not path.resolve().is_relative_to(ROOT)
    _run([sys.executable, "-m", "venv", str(path)], cwd=path.parent, timeout=300)
    return path


def _site(venv: Path) -> Path:
    out = _run([str(venv / "bin" / "python"), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
               cwd=venv)
    return Path(out.stdout.strip())


@pytest.fixture(scope="session")
def wheel(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """demur's wheel, built once per session from a copy of the sources the image copies."""
    src = tmp_path_factory.mktemp("wheel-src")
    for name in ("pyproject.toml", "README.md"):
        shutil.copy2(ROOT / name, src / name)
    ignore = shutil.ignore_patterns("__pycache__", "*.pyc")
    for name in ("serve", "export"):
        shutil.copytree(ROOT / name, src / name, ignore=ignore)
    dist = tmp_path_factory.mktemp("dist")
    _run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "--wheel-dir", str(dist),
          str(src)], cwd=src)
    [built] = sorted(dist.glob("demur-*.whl"))
    return built


def test_the_wheel_holds_every_package_and_data_file(wheel: Path) -> None:
    import zipfile

    names = set(zipfile.ZipFile(wheel).namelist())
    for need in ("demur/serve/web/loop/worker.py", "demur/serve/review/store/__init__.py",
                 "demur/serve/web/openapi.json", "demur/serve/web/static/review.html",
                 "demur/serve/web/static/review.js", "demur/serve/web/static/review.css",
                 "demur/serve/py.typed", "demur/export/exporter.py"):
        assert need in names, need
    checkout = {str(p.relative_to(ROOT)).replace("serve/", "demur/serve/", 1).replace("export/", "demur/export/", 1)
                for top in ("serve", "export") for p in (ROOT / top).rglob("*")
                if p.is_file() and "__pycache__" not in p.parts and p.suffix != ".pyc"}
    assert checkout <= names, sorted(checkout - names)[:10]


def test_the_runtime_wheel_serves_outside_the_checkout(wheel: Path, tmp_path_factory: pytest.TempPathFactory,
                                                       tiny_bundle_factory: Callable[..., Any]) -> None:
    """deploy/Containerfile's steps on a fresh virtualenv: install with the serve extra, run
    the recipe's check, then serve a bundle and answer a prediction and the reviewer page."""
    venv = _venv(tmp_path_factory.mktemp("runtime") / "venv")
    _run([str(venv / "bin" / "pip"), "install", "--quiet", f"{wheel}[serve]"], cwd=venv)
    check = _run(["sh", str(ROOT / "deploy" / "runtime-check.sh"), str(venv)], cwd=venv)
    print(check.stdout)
    assert "torch: not importable" in check.stdout and "front worker" in check.stdout
    assert "unavailable: demur.export is not installed" in check.stdout  # the torch-side commands say why
    assert "torch" not in _run([str(venv / "bin" / "pip"), "list"], cwd=venv).stdout.lower().split()
    where = _run([str(venv / "bin" / "python"), "-c", "import demur.serve; print(demur.serve.__file__)"], cwd=venv)
    assert Path(where.stdout.strip()).is_relative_to(venv), where.stdout  # the wheel's copy, not the checkout

    bundle = Path(tiny_bundle_factory().path)
    work = tmp_path_factory.mktemp("runtime-cwd")
    server = Server(bundle, work / "server.log", workers=1, threads=2, executable=venv / "bin" / "demur", cwd=work,
                    env={"DEMUR_DATA_DIR": str(work / "data")})
    with server:
        r = requests.post(server.url + "/v1/predict", json=digit_body(1), timeout=30)
        assert r.status_code == 200, r.text
        assert len(r.json()["results"]) == 1
        page = requests.get(server.url + "/review", timeout=30)
        assert page.status_code == 200 and page.headers["Content-Type"].startswith("text/html")
        assert requests.get(server.url + "/review/assets/review.js", timeout=30).status_code == 200
        assert requests.get(server.url + "/openapi.json", timeout=30).json()["openapi"].startswith("3.")
    assert "FrontWorker" in server.log() or "demur" in server.log()
    torch = _run([str(venv / "bin" / "python"), "-c", "import torch"], cwd=work, check=False)
    assert torch.returncode != 0 and "No module named 'torch'" in torch.stderr


def test_the_full_wheel_runs_the_torch_side_commands(wheel: Path, tmp_path_factory: pytest.TempPathFactory) -> None:
    venv = _venv(tmp_path_factory.mktemp("full") / "venv")
    site = _site(venv)
    # third-party packages (torch, onnx, numpy...) from the test environment; see the module docstring
    (site / "_demur_test_deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n", encoding="utf-8")
    _run([str(venv / "bin" / "pip"), "install", "--quiet", "--no-deps", str(wheel)], cwd=venv)
    work = tmp_path_factory.mktemp("full-cwd")
    where = _run([str(venv / "bin" / "python"), "-c",
                  "import demur.export, demur.serve; print(demur.export.__file__); print(demur.serve.__file__)"],
                 cwd=work)
    for line in where.stdout.split():
        assert Path(line).is_relative_to(venv), where.stdout  # demur from the wheel, not the checkout
    for command in ("export", "calibrate"):
        done = _run([str(venv / "bin" / "demur"), command, "--help"], cwd=work, timeout=300)
        assert done.stdout.startswith(f"usage: demur {command}"), done.stdout[:300]
