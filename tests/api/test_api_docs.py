"""The OpenAPI description and its browser page are off unless a setting turns them on (development only)."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from service.api.context import AppContext
from service.clock import FixedClock
from service.config import Settings
from service.main import build_context, create_app

DOC_PATHS = ["/openapi.json", "/docs", "/docs/oauth2-redirect", "/redoc"]


@pytest.mark.parametrize("path", DOC_PATHS)
def test_api_docs_are_not_served_by_default(context: AppContext, path: str) -> None:
    r = TestClient(create_app(context=context)).get(path)
    assert r.status_code == 404
    assert r.json()["resourceType"] == "OperationOutcome"


def test_api_docs_setting_is_off_by_default() -> None:
    assert Settings().api_docs is False


@pytest.fixture
def with_docs(sqlite_url: str, tmp_path: Path, clock: FixedClock) -> Iterator[AppContext]:
    settings = Settings(database_url=sqlite_url, data_dir=tmp_path, scheduler=False, api_docs=True)
    ctx = build_context(settings, clock=clock)
    yield ctx
    ctx.db.dispose()


def test_api_docs_are_served_when_the_setting_is_on(with_docs: AppContext) -> None:
    anonymous = TestClient(create_app(context=with_docs))
    assert anonymous.get("/openapi.json").json()["info"]["title"] == "lytestream"
    assert anonymous.get("/docs").status_code == 200
