"""The package list in pyproject.toml matches the tree, so the wheel holds what the checkout runs.

setuptools cannot discover our renamed layout (``serve/`` installs as ``demur.serve``), so
``[tool.setuptools] packages`` is written by hand. An editable install (``make test``)
hides a missing entry; a wheel does not: ``demur.serve.web.loop`` once went missing and
the installed server could not start. This test reads pyproject.toml (``tomllib``, the
standard library's TOML reader) and checks it against every folder under ``serve/`` and
``export/``; tests/test_wheel.py then builds and installs the real wheel.
"""

from __future__ import annotations

import fnmatch
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
SETUPTOOLS = PYPROJECT["tool"]["setuptools"]
_SKIP_DIRS = {"__pycache__"}
_SKIP_FILES = (".pyc", ".pyo")


def _package_dirs() -> dict[str, Path]:
    """Package name -> its folder, as setuptools maps them through ``package-dir``."""
    roots = {name: ROOT / folder for name, folder in SETUPTOOLS["package-dir"].items()}
    out = {}
    for name in SETUPTOOLS["packages"]:
        base = max((r for r in roots if name == r or name.startswith(r + ".")), key=len)
        rest = name[len(base):].lstrip(".")
        out[name] = roots[base].joinpath(*rest.split(".")) if rest else roots[base]
    return out


def _folders_with_files() -> dict[Path, list[Path]]:
    """Every folder under serve/ and export/ holding at least one file, with its files."""
    found: dict[Path, list[Path]] = {}
    for top in ("serve", "export"):
        for path in sorted((ROOT / top).rglob("*")):
            if not path.is_file() or _SKIP_DIRS & set(path.relative_to(ROOT).parts) or path.suffix in _SKIP_FILES:
                continue
            found.setdefault(path.parent, []).append(path)
    return found


def test_every_folder_with_code_or_data_is_a_listed_package() -> None:
    listed = set(_package_dirs().values())
    missing = [str(folder.relative_to(ROOT)) for folder in _folders_with_files() if folder not in listed]
    assert not missing, (f"folders not in [tool.setuptools] packages of pyproject.toml (the wheel would "
                         f"lack them): {missing}")


def test_every_listed_package_exists() -> None:
    gone = [name for name, folder in _package_dirs().items() if not folder.is_dir()]
    assert not gone, f"listed in pyproject.toml but no such folder: {gone}"


def test_code_packages_have_an_init_and_data_files_are_package_data() -> None:
    """A folder with .py files needs ``__init__.py`` (a regular package, not a namespace
    one); every other file must match a ``package-data`` pattern of its package."""
    data = SETUPTOOLS.get("package-data", {})
    folder_to_name = {folder: name for name, folder in _package_dirs().items()}
    problems = []
    for folder, files in _folders_with_files().items():
        name = folder_to_name[folder]
        if any(f.suffix == ".py" for f in files) and not (folder / "__init__.py").exists():
            problems.append(f"{folder.relative_to(ROOT)} has .py files but no __init__.py")
        for f in files:
            if f.suffix == ".py":
                continue
            if not any(fnmatch.fnmatch(f.name, pattern) for pattern in data.get(name, [])):
                problems.append(f"{f.relative_to(ROOT)} matches no package-data pattern of {name}")
    assert not problems, problems


def test_entry_points_name_listed_packages() -> None:
    """Every ``demur.commands`` entry point and the script live in a listed package."""
    listed = set(SETUPTOOLS["packages"])
    refs = [PYPROJECT["project"]["scripts"]["demur"],
            *PYPROJECT["project"]["entry-points"]["demur.commands"].values()]
    for ref in refs:
        module = ref.split(":")[0]
        assert module.rsplit(".", 1)[0] in listed or module in listed, ref
