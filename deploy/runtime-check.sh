#!/bin/sh
# The runtime image's last build step (deploy/Containerfile runs it on /opt/demur;
# tests/test_wheel.py runs it on a wheel installed in a fresh virtualenv), so the
# check that guards the image is itself tested.
#
#   sh deploy/runtime-check.sh VENV
#
# 1. removes the torch side (demur/export) from VENV: the runtime never needs it,
#    and its commands then show as "(unavailable: demur.export is not installed)";
# 2. fails if torch can be imported;
# 3. imports what `demur serve` loads, the production front's gunicorn worker
#    included, and finds the API document and the reviewer page's files;
# 4. prints `demur --help` (the commands this install has, and why the others are missing).
set -eu
venv=${1:?usage: runtime-check.sh VENV}
py="$venv/bin/python"
site=$("$py" -c 'import sysconfig; print(sysconfig.get_paths()["purelib"])')
test -d "$site/demur/serve" || { echo "no demur/serve in $site: the wheel is not installed there" >&2; exit 1; }
rm -rf "$site/demur/export"
echo "removed $site/demur/export"
if "$py" -c "import torch" 2>/dev/null; then echo "torch leaked into the runtime" >&2; exit 1; fi
echo "torch: not importable (as intended)"
"$py" - <<'PY'
import importlib
from importlib.resources import files

for name in ("demur.serve.web.server", "demur.serve.web.loop.worker", "demur.serve.review.store",
             "onnxruntime", "flask", "gunicorn", "httptools", "orjson", "psycopg", "psycopg_pool", "scipy"):
    importlib.import_module(name)
from demur.serve.web.loop.worker import FrontWorker  # the class gunicorn is told to load

assert files("demur.serve.web").joinpath("openapi.json").is_file(), "openapi.json missing"
for page in ("review.html", "review.js", "review.css"):
    assert files("demur.serve.web.static").joinpath(page).is_file(), f"static/{page} missing"
print("imports and data files: ok (front worker", FrontWorker.__module__ + "." + FrontWorker.__name__ + ")")
PY
"$venv/bin/demur" --help
