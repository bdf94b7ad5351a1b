"""serve/config.py: one frozen ServeConfig from defaults < TOML file < DEMUR_* environment < flags.

The precedence is the project's own contract (DEVELOPERS.md; the same order as the common
practice of twelve-factor style services: explicit beats ambient); TOML is parsed by the
standard library's ``tomllib`` (TOML 1.0).
"""

from __future__ import annotations

import dataclasses
import os
from pathlib import Path

import pytest

from demur.serve.config import ServeConfig, build_config, worker_count
from demur.serve.errors import ConfigError


def _file(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "demur.toml"
    path.write_text(text)
    return path


def test_each_source_overrides_the_one_before(tmp_path: Path) -> None:
    conf = _file(tmp_path, 'port = 8700\nthreads = 3\nscore = "predictive_entropy"\nthreshold = 0.5\n')
    env = {"DEMUR_PORT": "8800", "DEMUR_THREADS": "5", "HOME": "/root"}
    assert build_config().port == ServeConfig().port  # defaults
    assert build_config(conf).port == 8700  # file over defaults
    both = build_config(conf, env)
    assert (both.port, both.threads, both.score, both.threshold) == (8800, 5, "predictive_entropy", 0.5)
    flags = build_config(conf, env, {"port": 8900, "threads": None})  # None: flag not given
    assert (flags.port, flags.threads) == (8900, 5)


def test_values_are_typed_and_bad_ones_name_their_source(tmp_path: Path) -> None:
    cfg = build_config(env={"DEMUR_THRESHOLD": "", "DEMUR_AUDIT_FRACTION": "0.25", "DEMUR_SEED": "7"})
    assert cfg.threshold is None and cfg.audit_fraction == 0.25 and cfg.seed == 7
    with pytest.raises(ConfigError) as info:
        build_config(env={"DEMUR_PORT": "eighty"})
    assert info.value.field == "port" and "environment DEMUR_PORT" in info.value.message
    with pytest.raises(ConfigError) as info:
        build_config(_file(tmp_path, "port = true\n"))
    assert info.value.field == "port" and "demur.toml" in info.value.message
    with pytest.raises(ConfigError) as info:
        build_config(_file(tmp_path, "prot = 1\n"))
    assert info.value.field == "prot"  # a typo never passes silently
    with pytest.raises(ConfigError):
        build_config(flags={"trusted_proxies": "10.0.0.1, not-an-address"})


def test_frozen_and_sized_to_the_host() -> None:
    cfg = build_config()
    with pytest.raises(dataclasses.FrozenInstanceError):
        cfg.port = 1  # type: ignore[misc]
    assert cfg.workers == 0 and worker_count(cfg) == (os.cpu_count() or 1)
    assert worker_count(cfg.replace(workers=3)) == 3 and worker_count(cfg, cpus=8) == 8


def test_every_serve_flag_reaches_the_config() -> None:
    """A flag `demur serve` accepts but never hands to build_config would be silently ignored
    (found: --review-order, in the demo): every option's dest is passed or handled by name."""
    import argparse

    from demur.serve.web import server

    parser = argparse.ArgumentParser()
    server.register(parser.add_subparsers())
    serve = next(a for a in parser._subparsers._group_actions[0].choices.values())  # the one subcommand
    dests = {a.dest for a in serve._actions if a.dest not in ("help", "bundle", "config_file", "single")}
    assert dests <= set(server._FLAG_FIELDS), dests - set(server._FLAG_FIELDS)
