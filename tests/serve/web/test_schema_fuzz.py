"""The API document is the contract: schemathesis (a general-purpose OpenAPI fuzzer) against a
live ``demur serve`` on 127.0.0.1, every operation, with the predict, review and admin tokens
and with none. Zero failures.

Schemathesis reads ``GET /openapi.json`` (the file bound to the bundle serving:
serve/web/apidoc.py) and runs its phases (examples, coverage, fuzzing, stateful: the
OpenAPI links claim -> get / decide / release) with its checks, ``--checks all``:
no 5xx, documented status codes, content types and response schemas, every body the
document allows accepted (positive data acceptance), every body it forbids refused
with a 4xx (negative data rejection), auth not ignored, ``Allow`` matching the
document. Bounded: ``MAX_EXAMPLES`` per operation and phase, one worker, a fixed seed
(reproducible; ``DEMUR_FUZZ_SEED`` changes it, ``DEMUR_FUZZ_EXAMPLES`` the count). The server abstains on every case
(threshold -1; mutual information is >= 0) so predictions fill the review queue the
stateful phase claims and decides from.

Each run's requests are counted per operation from its HAR report and printed (the
figures the issue asks for). hooks: tests/serve/web/schema_fuzz_hooks.py; settings:
tests/serve/web/schemathesis.toml.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from collections import Counter
from collections.abc import Callable
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import pytest

from tests.reliability.harness import Server

pytestmark = [pytest.mark.slow]

ROOT = Path(__file__).resolve().parents[3]
ST = Path(sys.executable).with_name("st")
MAX_EXAMPLES = int(os.environ.get("DEMUR_FUZZ_EXAMPLES", "25"))
"""Examples per operation and phase; DEMUR_FUZZ_EXAMPLES=500 for a long run by hand."""
TOKENS = {"predict": "fuzz-predict-token-5b1e", "review": "fuzz-review-token-0c7d", "admin": "fuzz-admin-token-9a44"}
DOC = json.loads((ROOT / "serve" / "web" / "openapi.json").read_text())


def _operation_of(method: str, url: str) -> str:
    path = urlsplit(url).path
    for template, item in DOC["paths"].items():
        pattern = "^" + "/".join("[^/]+" if seg.startswith("{") else re.escape(seg)
                                 for seg in template.split("/")) + "$"
        if re.match(pattern, path) and method.lower() in item:
            return f"{method.upper()} {template}"
    return f"{method.upper()} (undocumented) {path[:40]}"


def _counts(har: Path) -> Counter[str]:
    entries = json.loads(har.read_text())["log"]["entries"]
    return Counter(_operation_of(e["request"]["method"], e["request"]["url"]) for e in entries)


@pytest.fixture(scope="module")
def fuzz_server(tiny_bundle_factory: Callable[..., Any], tmp_path_factory: pytest.TempPathFactory) -> Any:
    import shutil

    root = tmp_path_factory.mktemp("fuzz")
    bundles = root / "bundles"
    bundles.mkdir()
    shutil.copytree(tiny_bundle_factory().path, bundles / "current")
    env = {"DEMUR_DATA_DIR": str(root / "data"), "DEMUR_BUNDLES_DIR": str(bundles),
           "DEMUR_PREDICT_TOKENS": TOKENS["predict"], "DEMUR_REVIEW_TOKENS": TOKENS["review"],
           "DEMUR_ADMIN_TOKENS": TOKENS["admin"], "DEMUR_AUDIT_FRACTION": "0.2"}
    server = Server(bundles / "current", root / "server.log", workers=1, threads=4, env=env,
                    args=["--threshold", "-1"])
    with server:
        yield server
    log = server.log()
    assert "Traceback" not in log, log[log.index("Traceback") - 200:][:3000]


@pytest.mark.parametrize("who", ["admin", "review", "predict", "none"])
def test_schemathesis_finds_nothing(who: str, fuzz_server: Server, tmp_path: Path) -> None:
    har = tmp_path / "requests.har"
    cmd = [str(ST), "--config-file", str(ROOT / "tests" / "serve" / "web" / "schemathesis.toml"), "run",
           f"{fuzz_server.url}/openapi.json", "--checks", "all", "--max-examples", str(MAX_EXAMPLES),
           "--workers", "1", "--seed", os.environ.get("DEMUR_FUZZ_SEED", "20"), "--generation-database", "none",
           "--request-timeout", "30", "--report", "har", "--report-har-path", str(har), "--no-color",
           "--warnings", "off"]
    if who != "none":
        cmd += ["--header", f"Authorization: Bearer {TOKENS[who]}"]
    env = {k: v for k, v in os.environ.items() if not k.startswith("DEMUR_")}
    env["SCHEMATHESIS_HOOKS"] = "tests.serve.web.schema_fuzz_hooks"
    env["PYTHONPATH"] = str(ROOT)
    done = subprocess.run(cmd, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=900)
    counts = _counts(har) if har.exists() else Counter()
    table = "\n".join(f"  {n:6d}  {op}" for op, n in sorted(counts.items()))
    print(f"\nschemathesis as '{who}': {sum(counts.values())} requests\n{table}")
    (tmp_path.parent / f"fuzz-counts-{who}.json").write_text(json.dumps(dict(counts), indent=1))
    assert done.returncode == 0, done.stdout[-6000:] + done.stderr[-2000:]
    # GET /openapi.json is what schemathesis loads the document from (not in its HAR report)
    documented = {f"{m.upper()} {p}" for p, item in DOC["paths"].items() for m in item
                  if m in ("get", "post") and p != "/openapi.json"}
    assert documented <= set(counts), f"operations never called: {sorted(documented - set(counts))}"
