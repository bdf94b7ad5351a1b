"""A worker's compute threads: the engine loader limits numpy's BLAS to ``blas_threads``.

Checked with threadpoolctl's own report (``threadpool_info``), the library that sets the limit,
in a fresh process so the suite's own BLAS settings are untouched.
"""

from __future__ import annotations

import json
import subprocess
import sys
from typing import Any

import pytest

from demur.serve.config import build_config
from demur.serve.errors import ConfigError

_PROBE = """
import json, sys
import numpy, scipy.linalg  # both carry an OpenBLAS
from threadpoolctl import threadpool_info
from demur.serve.adapters.compute import engine_loader
from demur.serve.config import build_config
cfg = build_config(None, {}, {"bundle": sys.argv[1], **json.loads(sys.argv[2])})
before = [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]
engine_loader(cfg)(sys.argv[1])
after = [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]
print(json.dumps({"before": before, "after": after}))
"""


def _blas_threads(bundle_path: str, flags: dict[str, Any]) -> dict[str, list[int]]:
    env = {"PATH": "/usr/bin:/bin", "OPENBLAS_NUM_THREADS": "2"}   # as a 2-core host starts it, whatever this host is
    out = subprocess.run([sys.executable, "-c", _PROBE, bundle_path, json.dumps(flags)], capture_output=True,
                         text=True, timeout=120, env=env, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_the_engine_loader_limits_blas_to_one_thread_by_default(tiny_bundle_factory: Any) -> None:
    seen = _blas_threads(str(tiny_bundle_factory().path), {})
    assert seen["before"] and max(seen["before"]) == 2
    assert set(seen["after"]) == {1}


def test_blas_threads_is_a_setting(tiny_bundle_factory: Any) -> None:
    seen = _blas_threads(str(tiny_bundle_factory().path), {"blas_threads": 2})
    assert set(seen["after"]) == {2}
    with pytest.raises(ConfigError) as info:
        build_config(None, {"DEMUR_BLAS_THREADS": "0"}, {})
    assert info.value.field == "blas_threads"
