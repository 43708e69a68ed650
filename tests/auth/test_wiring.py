"""The dependencies inside the real application, beside its own exception handlers."""

from __future__ import annotations

from pathlib import Path

import pytest
from fastapi import APIRouter, Depends
from fastapi.testclient import TestClient

from service.auth.deps import Authenticator, install_auth, require
from service.auth.settings import AuthSettings
from service.auth.tables import ApiToken
from service.auth.tokens import mint
from service.clock import FixedClock
from service.config import Settings
from service.main import build_context, create_app

from .conftest import ISSUER, NOW


def test_refusals_reach_the_client_as_fhir_not_as_500(tmp_path: Path) -> None:
    settings = Settings(data_dir=tmp_path, base_url="http://testserver/fhir", scheduler=False)
    ctx = build_context(settings, clock=FixedClock(NOW))
    ApiToken.__table__.create(ctx.db.engine, checkfirst=True)  # type: ignore[attr-defined]
    app = create_app(context=ctx)
    probe = APIRouter(prefix="/fhir")

    @probe.get("/_auth_probe", dependencies=[Depends(require("Flag", "r"))])
    def _probe() -> dict[str, str]:
        return {"resourceType": "Flag"}

    app.include_router(probe)
    install_auth(app, Authenticator(AuthSettings(), db=ctx.db, clock=ctx.clock))
    with ctx.db.session(write=True) as s:
        reader = mint(s, client="ward-dashboard", scope="system/Flag.rs", now=NOW)
        writer = mint(s, client="lab-interface-engine", scope="system/Observation.cu", now=NOW)
    with TestClient(app) as client:
        assert client.get("/fhir/_auth_probe").status_code == 401
        refused = client.get("/fhir/_auth_probe", headers={"Authorization": f"Bearer {writer}"})
        assert refused.status_code == 403
        assert refused.json()["issue"][0]["code"] == "forbidden"
        allowed = client.get("/fhir/_auth_probe", headers={"Authorization": f"Bearer {reader}"})
        assert allowed.status_code == 200
    ctx.db.dispose()


def test_jwt_modes_need_their_settings() -> None:
    with pytest.raises(ValueError, match="issuer, audience, jwks_url"):
        AuthSettings(mode="jwt")
    with pytest.raises(ValueError, match="https"):
        AuthSettings(mode="both", issuer=ISSUER, audience="a", jwks_url="http://auth.hospital.test/jwks")
    local = AuthSettings(mode="jwt", issuer=ISSUER, audience="a", jwks_url="http://localhost:8081/jwks",
                         token_endpoint="http://localhost:8081/token")
    assert local.mode == "jwt"
    assert AuthSettings().algorithms == ("RS256", "ES256")
