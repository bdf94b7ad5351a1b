"""Every module's ``__all__`` is exact: it names only what exists, and every public
class or function the module defines (not imports) is listed (STYLE.md, rule 8)."""

from __future__ import annotations

import importlib
import inspect
import pkgutil

import pytest

import demur.export
import demur.serve

MODULES = sorted(
    info.name
    for pkg in (demur.serve, demur.export)
    for info in pkgutil.walk_packages(pkg.__path__, pkg.__name__ + ".")
    if not info.ispkg
)


@pytest.mark.parametrize("name", MODULES)
def test_all_is_exact(name: str) -> None:
    module = importlib.import_module(name)
    listed = getattr(module, "__all__", None)
    assert listed is not None, f"{name} has no __all__"
    missing = [n for n in listed if not hasattr(module, n)]
    assert not missing, f"{name}.__all__ names what does not exist: {missing}"
    defined = {
        n for n, obj in vars(module).items()
        if not n.startswith("_") and (inspect.isclass(obj) or inspect.isfunction(obj))
        and getattr(obj, "__module__", None) == name
    }
    unlisted = sorted(defined - set(listed))
    assert not unlisted, f"{name} defines public names missing from __all__: {unlisted}"
