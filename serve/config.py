"""The server's settings: one frozen object, built once, passed down.

Sources, later ones winning: the defaults below, a TOML file (``--config``),
environment variables prefixed ``DEMUR_`` (``DEMUR_PORT=8080``), then
command-line flags. Nothing here reads the environment at import time;
``build_config`` is handed the environment explicitly.

Example::

    cfg = build_config(file=None, env=os.environ, flags={"bundle": "build/bundle", "port": 8080})
"""

from __future__ import annotations

import dataclasses
import ipaddress
import os
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Any, get_args, get_type_hints

from demur.serve.core.bundle import GRAPH_KINDS
from demur.serve.errors import ConfigError

__all__ = ["ENV_PREFIX", "GRAPH_CHOICES", "ServeConfig", "build_config", "worker_count"]

ENV_PREFIX = "DEMUR_"

GRAPH_CHOICES = ("auto", *GRAPH_KINDS)
"""Values of the ``graph`` setting: a bundle graph kind, or ``auto`` (the sampler graph if the
bundle has one, else the stacked draws; serve/adapters/engine.py)."""

DEFAULT_HOST = "127.0.0.1"
DEFAULT_PORT = 8600
DEFAULT_MAX_CASES = 1024
DEFAULT_MAX_BODY_BYTES = 8 * 1024 * 1024
DEFAULT_LEASE_S = 300.0
DEFAULT_MAX_PENDING = 50_000
"""Pending review items above which abstentions are answered but not queued: at a minute
a case about 830 hours of one reviewer's time, past any backlog a team can work down."""



def worker_count(config: ServeConfig, cpus: int | None = None) -> int:
    """Worker processes to start: ``config.workers``, or one per core when it is 0 (the
    measured best on 2 cores: deploy/README.md, "Sizing")."""
    return config.workers or max(1, cpus or os.cpu_count() or 1)


@dataclass(frozen=True)
class ServeConfig:
    """Every setting the server reads. Units are in the names (``_s`` seconds,
    ``_ms`` milliseconds, ``_bytes``)."""

    bundle: str = ""
    bundles_dir: str = ""  # admin roll-outs may load only bundles under here; "" = the bundle's parent
    host: str = DEFAULT_HOST
    port: int = DEFAULT_PORT
    workers: int = 0  # 0: one worker process per core
    threads: int = 4  # per worker, for the routes other than predict (serve/web/loop/bridge.py)
    trusted_proxies: str = ""  # comma-separated proxy addresses whose X-Forwarded-For is believed
    # graph
    graph: str = "auto"  # auto | stacked | sampler | flip | means
    ort_intra_threads: int = 1
    ort_inter_threads: int = 1
    blas_threads: int = 1  # numpy's BLAS threads per process (the support check); more oversubscribe the cores
    seed: int | None = None  # fixes the sampler's random stream (tests only)
    # decision
    score: str = ""  # empty: the bundle's decision.score
    threshold: float | None = None  # None: the bundle's decision.threshold
    interval_level: float | None = None  # None: the bundle's interval_level
    # request limits
    max_cases: int = DEFAULT_MAX_CASES
    max_body_bytes: int = DEFAULT_MAX_BODY_BYTES
    request_timeout_s: float = 10.0
    # micro-batching
    batch_wait_ms: float = 0.0  # 0 batches what arrived in one loop pass (measured best, demur bench)
    batch_max_rows: int = 0  # cases per merged graph call; 0: by graph kind (serve/web/loop/batcher.py)
    queue_max_requests: int = 512
    # review
    data_dir: str = "demur-data"
    review_store: str = ""  # "" -> sqlite:///<data_dir>/reviews.sqlite3 ; or postgresql://...
    review_lease_s: float = DEFAULT_LEASE_S
    review_order: str = "oldest"  # or "most_uncertain": audits first, then abstentions by mutual information
    audit_fraction: float = 0.01
    spool_replay_s: float = 5.0
    review_max_pending: int = DEFAULT_MAX_PENDING  # ceiling on pending review items; 0: none
    review_quota_per_min: int = 0  # review items per caller (token) per minute, per process; 0: none
    # access: tokens come from these files or the matching DEMUR_*_TOKENS env (comma separated)
    predict_tokens: str = ""  # empty: predict is open
    review_tokens: str = ""
    admin_tokens: str = ""
    token_file: str = ""  # lines "scope:token"
    # monitoring
    drift_window: int = 500  # recent cases kept for PSI / KS
    abstain_window: int = 1000  # recent decisions for the instant abstention rate
    metrics_multiprocess_dir: str = ""

    def replace(self, **changes: Any) -> ServeConfig:
        return dataclasses.replace(self, **changes)

    @property
    def review_store_url(self) -> str:
        if self.review_store:
            return self.review_store
        return f"sqlite:///{Path(self.data_dir) / 'reviews.sqlite3'}"


def _coerce(name: str, hint: Any, value: Any, source: str) -> Any:
    """``value`` (from TOML, an environment string or a flag) as the field's type.
    ``T | None`` fields take None, or an empty string from the environment, as "not set"."""
    args = [a for a in get_args(hint) if a is not type(None)]
    optional = len(args) < len(get_args(hint))
    kind = args[0] if args else hint
    if value is None or (optional and isinstance(value, str) and value.strip() == ""):
        if optional:
            return None
        raise ConfigError(f"setting '{name}' from {source} needs a value", field=name)
    try:
        if kind is bool:
            if isinstance(value, bool):
                return value
            low = str(value).strip().lower()
            if low in ("1", "true", "yes", "on"):
                return True
            if low in ("0", "false", "no", "off"):
                return False
            raise ValueError(value)
        if kind in (int, float) and isinstance(value, bool):
            raise ValueError(value)  # TOML true is not a number
        if kind is int:
            return int(value)
        if kind is float:
            return float(value)
        return str(value)
    except (TypeError, ValueError):
        raise ConfigError(f"setting '{name}' from {source} must be {getattr(kind, '__name__', kind)}; "
                          f"got {value!r}", field=name) from None


def build_config(
    file: str | os.PathLike[str] | None = None,
    env: Mapping[str, str] | None = None,
    flags: Mapping[str, Any] | None = None,
) -> ServeConfig:
    """Defaults, then the TOML file, then ``DEMUR_*`` environment variables, then flags.

    Unknown keys in the file or flags are an error (a typo should not pass silently);
    flags whose value is ``None`` mean "not given" and are skipped.
    """
    hints = get_type_hints(ServeConfig)
    known = {f.name for f in fields(ServeConfig)}
    values: dict[str, Any] = {}

    if file:
        try:
            with open(file, "rb") as f:
                data = tomllib.load(f)
        except FileNotFoundError:
            raise ConfigError(f"config file {file} does not exist", field="config") from None
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"config file {file} is not valid TOML: {exc}", field="config") from None
        for key, value in data.items():
            if key not in known:
                raise ConfigError(f"config file {file} has unknown setting '{key}'", field=key)
            values[key] = _coerce(key, hints[key], value, f"file {file}")

    for key, value in (env or {}).items():
        if key.startswith(ENV_PREFIX):
            name = key[len(ENV_PREFIX):].lower()
            if name in known:
                values[name] = _coerce(name, hints[name], value, f"environment {key}")

    for key, value in (flags or {}).items():
        if value is None:
            continue
        if key not in known:
            raise ConfigError(f"unknown setting '{key}'", field=key)
        values[key] = _coerce(key, hints[key], value, f"flag --{key.replace('_', '-')}")

    cfg = ServeConfig(**values)
    _check(cfg)
    return cfg


def _check(cfg: ServeConfig) -> None:
    if not 0 < cfg.port < 65536:
        raise ConfigError(f"port must be in 1..65535; got {cfg.port}", field="port")
    if cfg.workers < 0:
        raise ConfigError(f"workers must be >= 0 (0: one per core); got {cfg.workers}", field="workers")
    for name in ("threads", "ort_intra_threads", "ort_inter_threads", "blas_threads", "max_cases",
                 "max_body_bytes", "queue_max_requests", "drift_window", "abstain_window"):
        if getattr(cfg, name) < 1:
            raise ConfigError(f"{name} must be at least 1; got {getattr(cfg, name)}", field=name)
    for name in ("review_max_pending", "review_quota_per_min"):
        if getattr(cfg, name) < 0:
            raise ConfigError(f"{name} must be >= 0 (0: no limit); got {getattr(cfg, name)}", field=name)
    if cfg.batch_max_rows < 0:
        raise ConfigError(f"batch_max_rows must be >= 0 (0: chosen by graph kind); got {cfg.batch_max_rows}",
                          field="batch_max_rows")
    try:
        for item in cfg.trusted_proxies.split(","):
            if item.strip():
                ipaddress.ip_address(item.strip())
    except ValueError:
        raise ConfigError(f"trusted_proxies must be comma-separated IP addresses; got {cfg.trusted_proxies!r}",
                          field="trusted_proxies") from None
    if cfg.graph not in GRAPH_CHOICES:
        raise ConfigError(f"graph must be one of {', '.join(GRAPH_CHOICES)}; got '{cfg.graph}'", field="graph")
    if not 0.0 <= cfg.audit_fraction <= 1.0:
        raise ConfigError(f"audit_fraction must be in [0, 1]; got {cfg.audit_fraction}", field="audit_fraction")
    if cfg.interval_level is not None and not 0.0 < cfg.interval_level < 1.0:
        raise ConfigError(f"interval_level must be in (0, 1); got {cfg.interval_level}", field="interval_level")
    if cfg.review_order not in ("oldest", "most_uncertain"):
        raise ConfigError(f"review_order must be 'oldest' or 'most_uncertain'; got {cfg.review_order!r}",
                          field="review_order")
    if cfg.batch_wait_ms < 0 or cfg.request_timeout_s <= 0 or cfg.review_lease_s <= 0:
        raise ConfigError("batch_wait_ms must be >= 0; request_timeout_s and review_lease_s > 0", field="timing")
