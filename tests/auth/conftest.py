"""Keys, a JWKS endpoint (respx), a token store, and a small app guarded by the dependencies."""

from __future__ import annotations

import json
import time
from collections.abc import Callable, Iterator
from datetime import UTC, datetime
from typing import Any

import httpx
import jwt
import pytest
import respx
from cryptography.hazmat.primitives.asymmetric import ec, rsa
from fastapi import Depends, FastAPI
from fastapi.testclient import TestClient
from sqlmodel import SQLModel

from service.auth.deps import Authenticator, CallerDep, entry_allowed, install_auth, require
from service.auth.settings import AuthSettings
from service.auth.tables import ApiToken
from service.clock import FixedClock
from service.db.engine import Database

ISSUER = "https://auth.hospital.test/realms/clinical"
AUDIENCE = "https://lytestream.hospital.test/fhir"
JWKS_URL = "https://auth.hospital.test/realms/clinical/jwks"
NOW = datetime(2026, 3, 2, 12, 0, tzinfo=UTC)


class Keys:
    """An RSA and an EC signing key of the authorisation server, plus one it never published."""

    def __init__(self) -> None:
        self.rsa = rsa.generate_private_key(public_exponent=65537, key_size=2048)
        self.ec = ec.generate_private_key(ec.SECP256R1())
        self.rogue = rsa.generate_private_key(public_exponent=65537, key_size=2048)

    def jwks(self, *, include: tuple[str, ...] = ("rsa-1", "ec-1")) -> dict[str, Any]:
        keys = []
        for kid in include:
            private = {"rsa-1": self.rsa, "ec-1": self.ec, "rsa-2": self.rogue}[kid]
            jwk = json.loads(jwt.algorithms.RSAAlgorithm.to_jwk(private.public_key()) if kid.startswith("rsa")
                             else jwt.algorithms.ECAlgorithm.to_jwk(private.public_key()))
            jwk.update({"kid": kid, "use": "sig"})
            keys.append(jwk)
        return {"keys": keys}


@pytest.fixture(scope="session")
def keys() -> Keys:
    return Keys()


@pytest.fixture
def claims() -> dict[str, Any]:
    """A valid RFC 9068-style access token body for a lab feed at NOW."""
    at = int(NOW.timestamp())
    return {"iss": ISSUER, "aud": AUDIENCE, "sub": "lab-interface-engine",
            "client_id": "lab-interface-engine", "iat": at - 10, "nbf": at - 10, "exp": at + 300, "jti": "a1",
            "scope": "system/Observation.cu"}


MakeJwt = Callable[..., str]


@pytest.fixture
def make_jwt(keys: Keys, claims: dict[str, Any]) -> MakeJwt:
    def make(*, alg: str = "RS256", kid: str | None = "rsa-1", typ: str = "at+jwt", key: Any = None,
             **changes: Any) -> str:
        body = {**claims, **changes}
        body = {k: v for k, v in body.items() if v is not None}
        signing = key if key is not None else keys.ec if alg.startswith("ES") else keys.rsa
        headers: dict[str, Any] = {"typ": typ}
        if kid is not None:
            headers["kid"] = kid
        return jwt.encode(body, signing, algorithm=alg, headers=headers)

    return make


@pytest.fixture
def jwks_route(keys: Keys) -> Iterator[respx.Route]:
    with respx.mock(assert_all_called=False) as mock:
        yield mock.get(JWKS_URL).mock(return_value=httpx.Response(200, json=keys.jwks()))


class Ticker:
    """A monotonic clock the test moves by hand."""

    def __init__(self) -> None:
        self.at = time.monotonic()

    def __call__(self) -> float:
        return self.at


@pytest.fixture
def ticker() -> Ticker:
    return Ticker()


@pytest.fixture
def jwt_settings() -> AuthSettings:
    return AuthSettings(mode="both", issuer=ISSUER, audience=AUDIENCE, jwks_url=JWKS_URL,
                        token_endpoint="https://auth.hospital.test/realms/clinical/token")


@pytest.fixture
def fixed_clock() -> FixedClock:
    return FixedClock(NOW)


@pytest.fixture
def db(sqlite_url: str) -> Iterator[Database]:
    database = Database(sqlite_url)
    SQLModel.metadata.create_all(database.engine, tables=[ApiToken.__table__])  # type: ignore[attr-defined]
    yield database
    database.dispose()


def guarded_app(authenticator: Authenticator) -> FastAPI:
    """Routes shaped like the service's, each behind the dependency it would carry."""
    app = FastAPI()
    install_auth(app, authenticator)

    @app.get("/fhir/Observation", dependencies=[Depends(require("Observation", "s"))])
    def search() -> dict[str, str]:
        return {"resourceType": "Bundle"}

    @app.get("/fhir/Observation/{rid}", dependencies=[Depends(require("Observation", "r"))])
    def read(rid: str) -> dict[str, str]:
        return {"resourceType": "Observation", "id": rid}

    @app.post("/fhir/Observation", status_code=201, dependencies=[Depends(require("Observation", "c"))])
    def create() -> dict[str, str]:
        return {"resourceType": "Observation"}

    @app.post("/fhir")
    def bundle(caller: CallerDep) -> dict[str, Any]:
        # What an ingest route does per entry; here with a fixed two-entry transaction.
        issues = [entry_allowed(caller, "Observation", "PUT", url="Observation?identifier=s|1"),
                  entry_allowed(caller, "Flag", "GET", url="Flag?patient=Patient/x")]
        return {"client": caller.client_id, "denied": [i.message for i in issues if i is not None]}

    return app


@pytest.fixture
def app_client(jwt_settings: AuthSettings, db: Database, fixed_clock: FixedClock, ticker: Ticker,
               jwks_route: respx.Route) -> Iterator[TestClient]:
    http = httpx.Client()
    auth = Authenticator(jwt_settings, db=db, clock=fixed_clock, http=http, monotonic=ticker)
    with TestClient(guarded_app(auth)) as client:
        yield client
    http.close()
