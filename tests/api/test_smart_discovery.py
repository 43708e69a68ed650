"""SMART discovery: SMART App Launch 2.x, "Conformance" / "Discovery"
(https://hl7.org/fhir/smart-app-launch/conformance.html), and the CapabilityStatement's oauth-uris extension
(http://fhir-registry.smarthealthit.org/StructureDefinition/oauth-uris, sub-extensions token and authorize).
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.auth.settings import AuthSettings
from service.clock import FixedClock
from service.config import Settings
from service.main import build_context, create_app

ISSUER = "https://auth.hospital.test"
TOKEN = "https://auth.hospital.test/oauth2/token"
AUTHORIZE = "https://auth.hospital.test/oauth2/authorize"
OAUTH_URIS = "http://fhir-registry.smarthealthit.org/StructureDefinition/oauth-uris"


def app_with(tmp_path: Path, clock: FixedClock, auth: AuthSettings) -> Iterator[TestClient]:
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'db.sqlite'}", data_dir=tmp_path, scheduler=False,
                        base_url="http://testserver/fhir", auth=auth)
    ctx = build_context(settings, clock=clock)
    with TestClient(create_app(context=ctx)) as anonymous:  # no token: discovery is public
        yield anonymous
    ctx.db.dispose()


@pytest.fixture
def jwt_server(tmp_path: Path, clock: FixedClock) -> Iterator[TestClient]:
    yield from app_with(tmp_path, clock, AuthSettings(
        mode="jwt", issuer=ISSUER, audience="http://testserver/fhir", jwks_url="https://auth.hospital.test/jwks",
        token_endpoint=TOKEN, authorization_endpoint=AUTHORIZE))


@pytest.fixture
def minted_server(tmp_path: Path, clock: FixedClock) -> Iterator[TestClient]:
    yield from app_with(tmp_path, clock, AuthSettings())


def security(capability: dict[str, Any]) -> dict[str, Any]:
    return dict(capability["rest"][0]["security"])


@pytest.mark.parametrize("path", ["/.well-known/smart-configuration", "/fhir/.well-known/smart-configuration"])
def test_smart_configuration_is_public_and_names_the_token_endpoint(jwt_server: TestClient, path: str) -> None:
    r = jwt_server.get(path)
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].startswith("application/json")
    config = r.json()
    # Conformance: token_endpoint, capabilities and (for client_credentials) grant_types_supported.
    assert config["token_endpoint"] == TOKEN
    assert config["issuer"] == ISSUER
    assert config["jwks_uri"] == "https://auth.hospital.test/jwks"
    assert config["authorization_endpoint"] == AUTHORIZE
    assert "client_credentials" in config["grant_types_supported"]
    assert {"permission-v1", "permission-v2"} <= set(config["capabilities"])


def test_smart_configuration_lists_the_system_scopes_understood(jwt_server: TestClient) -> None:
    scopes = jwt_server.get("/.well-known/smart-configuration").json()["scopes_supported"]
    assert {"system/Observation.cu", "system/Flag.rs", "system/Subscription.cruds"} <= set(scopes)


def test_jwt_mode_capability_statement_carries_the_oauth_uris(jwt_server: TestClient) -> None:
    (ext,) = [e for e in security(jwt_server.get("/fhir/metadata").json()).get("extension", [])
              if e["url"] == OAUTH_URIS]
    subs = {e["url"]: e["valueUri"] for e in ext["extension"]}
    assert subs == {"token": TOKEN, "authorize": AUTHORIZE}


def test_minted_mode_has_no_oauth_uris(minted_server: TestClient) -> None:
    extensions = security(minted_server.get("/fhir/metadata").json()).get("extension", [])
    assert [e for e in extensions if e["url"] == OAUTH_URIS] == []


def test_minted_mode_smart_configuration_says_there_is_no_token_endpoint(minted_server: TestClient) -> None:
    r = minted_server.get("/.well-known/smart-configuration")
    assert r.status_code == 404
    assert r.json()["resourceType"] == "OperationOutcome"
    assert "lytestream token create" in r.json()["issue"][0]["diagnostics"]


def test_jwt_mode_needs_a_token_endpoint() -> None:
    with pytest.raises(ValueError, match="token_endpoint"):
        AuthSettings(mode="jwt", issuer=ISSUER, audience="a", jwks_url="https://auth.hospital.test/jwks")
