"""serve/cli.py: the ``demur`` command as a user meets it, in fresh interpreters.

Reference: POSIX utility conventions (common practice): exit 0 on success, 2 for a usage
error, another non-zero status for a failure, the message on standard error, never a
Python traceback.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

COMMANDS = ("serve", "status", "score", "train", "export", "calibrate", "evaluate", "bench")


def _demur(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "demur.serve.cli", *args], cwd=cwd, capture_output=True,
                          text=True, timeout=120)


def test_help_lists_every_command(tmp_path: Path) -> None:
    out = _demur("--help", cwd=tmp_path)
    assert out.returncode == 0
    for name in COMMANDS:
        assert name in out.stdout, name


def test_usage_errors_exit_2_with_a_message(tmp_path: Path) -> None:
    for args in ((), ("no-such-command",), ("serve",), ("serve", "b", "--port", "eighty")):
        out = _demur(*args, cwd=tmp_path)
        assert out.returncode == 2, args
        assert "usage:" in out.stderr and "Traceback" not in out.stderr, args


def test_failures_name_the_problem_without_a_traceback(tmp_path: Path) -> None:
    out = _demur("serve", str(tmp_path / "missing-bundle"), "--port", "8601", cwd=tmp_path)
    assert out.returncode == 1 and "Traceback" not in out.stderr
    assert out.stderr.startswith("demur serve:") and "missing-bundle" in out.stderr
    out = _demur("serve", str(tmp_path), "--port", "8601", "--workers", "-1", cwd=tmp_path)
    assert out.returncode == 1 and "workers" in out.stderr and "Traceback" not in out.stderr
    out = _demur("calibrate", str(tmp_path / "missing-bundle"), "--data", "digits", cwd=tmp_path)
    assert out.returncode == 1 and "Traceback" not in out.stderr and "missing-bundle" in out.stderr
