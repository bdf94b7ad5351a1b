"""Fixtures for the HTTP runtime: ``make_app``, ``app``, ``client`` (tiny untrained bundle),
``regression_client``, ``image_client`` and ``demo_client`` (the trained digits demo bundle).

Every app gets a fresh ``ServeConfig`` and a fresh ``Engine`` (seeded), so tests never share
mutable state; bundles come from tests/conftest.py and are read-only.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest

from demur.serve.web.app import create_app
from demur.serve.config import ServeConfig
from demur.serve.adapters.engine import Engine

ROOT_DIR = Path(__file__).resolve().parents[2]
"""The repository root (sample_requests/, serve/web/openapi.json)."""


@pytest.fixture()
def make_app(tmp_path: Any) -> Callable[..., Any]:
    """``make_app(bundle, **config_changes) -> Flask``: an app serving ``bundle`` (engine seeded 0).
    Its review queue (SQLite) and spool live under this test's ``tmp_path``."""

    def make(bundle: Any, *, review: Any = None, metrics: Any = None, **changes: Any) -> Any:
        changes.setdefault("data_dir", str(tmp_path / "demur-data"))
        config = ServeConfig(bundle=str(bundle.path), seed=0, **changes)
        engine = Engine(bundle, graph=config.graph, seed=config.seed)
        return create_app(config, engine=engine, review=review, metrics=metrics)

    return make


@pytest.fixture()
def app(tiny_bundle_factory: Callable[..., Any], make_app: Callable[..., Any]) -> Any:
    """A classifier on the digits' 64-feature input spec, 8 stacked draws, untrained."""
    return make_app(tiny_bundle_factory(task="classification", kind="stacked", draws=8))


@pytest.fixture()
def client(app: Any) -> Any:
    return app.test_client()


@pytest.fixture()
def regression_client(tiny_bundle_factory: Callable[..., Any], make_app: Callable[..., Any]) -> Any:
    return make_app(tiny_bundle_factory(task="regression", kind="stacked", draws=8)).test_client()


@pytest.fixture()
def image_client(tiny_bundle_factory: Callable[..., Any], make_app: Callable[..., Any]) -> Any:
    """A conv classifier whose input shape is [1, 8, 8]."""
    return make_app(tiny_bundle_factory(task="classification", kind="stacked", draws=8, arch="conv")).test_client()


@pytest.fixture()
def demo_client(demo_bundle: Any, make_app: Callable[..., Any]) -> Any:
    """The trained digits demo (radial MLP, stacked draws, S = 32)."""
    return make_app(demo_bundle).test_client()


@pytest.fixture(params=["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def store_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """The URL of an empty review store: a SQLite file under tmp_path, or a fresh schema on
    the real PostgreSQL (dropped afterwards)."""
    from tests.serve._review_helpers import PG_URL, pg_schema, require_postgres, with_schema

    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'reviews.sqlite3'}"
        return
    require_postgres()
    with pg_schema() as schema:
        yield with_schema(PG_URL, schema)
