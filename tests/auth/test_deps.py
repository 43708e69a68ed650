"""Refusals over HTTP: status, OperationOutcome issue code, and the RFC 6750 challenge."""

from __future__ import annotations

import logging
from datetime import timedelta
from typing import Any

import httpx
import pytest
import respx
from cryptography.hazmat.primitives import serialization
from fastapi.testclient import TestClient

from service.auth.deps import Authenticator, AuthFailure, entry_allowed, entry_interactions, require
from service.auth.principal import Principal
from service.auth.scopes import parse_scopes
from service.auth.settings import AuthConfigError, AuthSettings
from service.auth.tokens import mint, revoke
from service.clock import FixedClock
from service.db.engine import Database

from .conftest import NOW, Keys, MakeJwt, guarded_app
from .forge import hmac_signed, unsigned

REALM = 'Bearer realm="lytestream"'


def bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def outcome_code(response: httpx.Response) -> str:
    body = response.json()
    assert body["resourceType"] == "OperationOutcome"
    assert response.headers["content-type"].startswith("application/fhir+json")
    code: str = body["issue"][0]["code"]
    return code


def assert_invalid_token(response: httpx.Response, description: str, code: str = "login") -> None:
    assert response.status_code == 401
    assert response.headers["www-authenticate"] == (
        f'{REALM}, error="invalid_token", error_description="{description}"')
    assert outcome_code(response) == code


def test_no_credentials_get_a_bare_challenge(app_client: TestClient) -> None:
    # RFC 6750 §3.1: with no authentication information, no error code in the challenge.
    for headers in ({}, {"Authorization": "Basic dXNlcjpwYXNz"}):
        response = app_client.get("/fhir/Observation", headers=headers)
        assert response.status_code == 401
        assert response.headers["www-authenticate"] == REALM
        assert outcome_code(response) == "login"


@pytest.mark.parametrize(
    ("authorization", "description"),
    [
        ("Bearer ", "the bearer token is empty"),
        ("Bearer not a token", "the bearer token is malformed"),
        ("Bearer abc.def", "the token is not a well-formed JWT"),
        ("Bearer lyt_" + "A" * 43, "the token is not known, or has been revoked"),
    ],
)
def test_malformed_or_unknown_tokens_are_invalid(app_client: TestClient, authorization: str,
                                                 description: str) -> None:
    response = app_client.get("/fhir/Observation", headers={"Authorization": authorization})
    assert_invalid_token(response, description)


def test_expired_jwt_gets_401_expired(app_client: TestClient, make_jwt: MakeJwt) -> None:
    response = app_client.get("/fhir/Observation", headers=bearer(make_jwt(exp=int(NOW.timestamp()) - 60)))
    assert_invalid_token(response, "the access token has expired", code="expired")


@pytest.mark.parametrize(
    ("changes", "description"),
    [
        ({"aud": "https://other.test/fhir"}, "the token is not meant for this service (aud)"),
        ({"iss": "https://auth.elsewhere.test"},
         "the token was not issued by the trusted authorisation server"),
    ],
)
def test_wrong_audience_or_issuer_gets_401(app_client: TestClient, make_jwt: MakeJwt, changes: dict[str, Any],
                                           description: str) -> None:
    response = app_client.get("/fhir/Observation", headers=bearer(make_jwt(**changes)))
    assert_invalid_token(response, description)


def test_wrong_signature_gets_401(app_client: TestClient, make_jwt: MakeJwt, keys: Keys) -> None:
    response = app_client.get("/fhir/Observation", headers=bearer(make_jwt(key=keys.rogue)))
    assert_invalid_token(response, "the token's signature does not verify")


def test_alg_none_and_hs256_confusion_get_401(app_client: TestClient, claims: dict[str, Any],
                                              keys: Keys) -> None:
    pem = keys.rsa.public_key().public_bytes(serialization.Encoding.PEM,
                                             serialization.PublicFormat.SubjectPublicKeyInfo)
    for token in (unsigned({"alg": "none", "typ": "at+jwt", "kid": "rsa-1"}, claims),
                  hmac_signed({"alg": "HS256", "typ": "at+jwt", "kid": "rsa-1"}, claims, pem)):
        response = app_client.get("/fhir/Observation", headers={"Authorization": f"Bearer {token}"})
        assert_invalid_token(response, "the token's signing algorithm is not accepted")


def test_unknown_kid_refetches_the_jwks_once(app_client: TestClient, make_jwt: MakeJwt, keys: Keys,
                                             jwks_route: respx.Route) -> None:
    token = make_jwt(kid="rsa-2", key=keys.rogue)
    assert_invalid_token(app_client.get("/fhir/Observation", headers=bearer(token)),
                         "the token was signed with a key the authorisation server does not publish")
    assert jwks_route.call_count == 1  # first load; the kid was looked up in fresh keys, no second fetch


def test_insufficient_scope_gets_403_naming_the_scope_needed(app_client: TestClient,
                                                             make_jwt: MakeJwt) -> None:
    response = app_client.post("/fhir/Observation", headers=bearer(make_jwt(scope="system/Flag.rs")))
    assert response.status_code == 403
    assert response.headers["www-authenticate"] == (
        f'{REALM}, error="insufficient_scope", error_description="the token\'s scopes do not cover this '
        f'request; it needs system/Observation.c", scope="system/Observation.c"')
    assert outcome_code(response) == "forbidden"


def test_a_v1_read_scope_allows_search_and_read_but_not_create(app_client: TestClient,
                                                               make_jwt: MakeJwt) -> None:
    headers = bearer(make_jwt(scope="system/Observation.read"))  # SMART-2: v1 .read ⇒ v2 .rs
    assert app_client.get("/fhir/Observation", headers=headers).status_code == 200
    assert app_client.get("/fhir/Observation/o1", headers=headers).json()["id"] == "o1"
    assert app_client.post("/fhir/Observation", headers=headers).status_code == 403


def test_minted_token_create_verify_revoke_refused(app_client: TestClient, db: Database) -> None:
    with db.session(write=True) as s:
        token = mint(s, client="ward-dashboard", scope="system/Observation.rs", now=NOW)
    assert app_client.get("/fhir/Observation", headers=bearer(token)).status_code == 200
    with db.session(write=True) as s:
        revoke(s, client="ward-dashboard", now=NOW)
    assert_invalid_token(app_client.get("/fhir/Observation", headers=bearer(token)),
                         "the token is not known, or has been revoked")


def test_minted_use_is_recorded_at_most_once_a_minute(db: Database, fixed_clock: FixedClock) -> None:
    from service.auth.tokens import active_tokens

    auth = Authenticator(AuthSettings(), db=db, clock=fixed_clock)
    with db.session(write=True) as s:
        token = mint(s, client="ward-dashboard", scope="system/Flag.rs", now=NOW)
    auth.authenticate(f"Bearer {token}")
    fixed_clock.advance(timedelta(seconds=30))
    auth.authenticate(f"Bearer {token}")
    with db.session() as s:
        assert active_tokens(s, client="ward-dashboard")[0].last_used_at == NOW
    fixed_clock.advance(timedelta(seconds=31))
    auth.authenticate(f"Bearer {token}")
    with db.session() as s:
        assert active_tokens(s, client="ward-dashboard")[0].last_used_at == NOW + timedelta(seconds=61)


def test_mode_decides_which_kind_of_token_is_accepted(db: Database, fixed_clock: FixedClock,
                                                      make_jwt: MakeJwt, jwt_settings: AuthSettings,
                                                      jwks_route: respx.Route) -> None:
    with db.session(write=True) as s:
        minted = mint(s, client="ward-dashboard", scope="system/Flag.rs", now=NOW)
    only_minted = Authenticator(AuthSettings(mode="minted"), db=db, clock=fixed_clock)
    only_jwt = Authenticator(jwt_settings.model_copy(update={"mode": "jwt"}), db=db, clock=fixed_clock,
                             http=httpx.Client())
    assert only_minted.authenticate(f"Bearer {minted}").kind == "minted"
    with pytest.raises(AuthFailure, match="only tokens minted by this service"):
        only_minted.authenticate(f"Bearer {make_jwt()}")
    assert only_jwt.authenticate(f"Bearer {make_jwt()}").kind == "jwt"
    with pytest.raises(AuthFailure, match="minted by this service are not accepted"):
        only_jwt.authenticate(f"Bearer {minted}")


def test_bundle_entries_are_checked_one_by_one(app_client: TestClient, make_jwt: MakeJwt) -> None:
    feed = app_client.post("/fhir", headers=bearer(make_jwt(scope="system/Observation.cu")))
    assert feed.json() == {"client": "lab-interface-engine",
                           "denied": ["the token's scopes do not cover this entry; it needs system/Flag.s"]}
    scope = "system/Observation.u system/Flag.s"
    update_only = app_client.post("/fhir", headers=bearer(make_jwt(scope=scope)))
    assert update_only.json()["denied"] == [
        "the token's scopes do not cover this entry; it needs system/Observation.cu"]


@pytest.mark.parametrize(
    ("method", "url", "needed"),
    [
        ("POST", "Observation", "c"),
        ("POST", "Observation/_search", "s"),
        # SMART-2 §Scopes for requesting clinical data: an update that creates "is allowed by the update
        # scope"
        ("PUT", "Observation/o1", "u"),
        ("PUT", "Observation?identifier=https://lab.test/id|A1", "cu"),  # conditional: may create
        ("PATCH", "Observation/o1", "u"),
        ("DELETE", "Observation/o1", "d"),
        ("GET", "Observation/o1", "r"),  # SMART-2: r = read, vread, instance history
        ("GET", "Observation/o1/_history/2", "r"),
        ("GET", "Observation/o1/_history", "r"),
        ("GET", "Observation?code=http://loinc.org|2951-2", "s"),  # SMART-2: s = type search, type history
        ("GET", "Observation/_history", "s"),
        ("GET", "https://lytestream.hospital.test/fhir/Observation/o1", "r"),
        ("GET", None, "rs"),
    ],
)
def test_entry_interactions(method: str, url: str | None, needed: str) -> None:
    assert entry_interactions("Observation", method, url) == frozenset(needed)


def test_entry_allowed_returns_an_issue_only_when_refused() -> None:
    caller = Principal("feed", parse_scopes("system/Observation.cu").grants, "minted")
    assert entry_allowed(caller, "Observation", "POST", url="Observation") is None
    issue = entry_allowed(caller, "Observation", "DELETE", url="Observation/o1")
    assert issue is not None and (issue.code, issue.status) == ("forbidden", 403)
    odd = entry_allowed(caller, "Observation", "TRACE", url="Observation")
    assert odd is not None and odd.code == "not-supported"


def test_require_refuses_an_unknown_interaction() -> None:
    with pytest.raises(ValueError):
        require("Observation", "x")


def test_disabled_lets_everything_through_in_tests_only(db: Database, fixed_clock: FixedClock,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    settings = AuthSettings(disabled=True)
    with TestClient(guarded_app(Authenticator(settings, db=db, clock=fixed_clock))) as client:
        assert client.post("/fhir/Observation").status_code == 201
    monkeypatch.setattr("service.auth.deps.running_under_pytest", lambda: False)
    with pytest.raises(AuthConfigError, match="tests only"):
        Authenticator(settings, db=db, clock=fixed_clock)


def test_a_guarded_route_without_install_fails_closed(db: Database) -> None:
    from fastapi import Depends, FastAPI

    app = FastAPI()

    @app.get("/x", dependencies=[Depends(require("Flag", "r"))])
    def x() -> dict[str, str]:
        return {}

    with TestClient(app, raise_server_exceptions=False) as client:
        assert client.get("/x").status_code == 500


def test_logs_hold_no_tokens_or_patient_identifiers(app_client: TestClient, make_jwt: MakeJwt, db: Database,
                                                    caplog: pytest.LogCaptureFixture) -> None:
    with db.session(write=True) as s:
        minted = mint(s, client="ward-dashboard", scope="system/Flag.rs", now=NOW)
    signed = make_jwt(scope="system/Flag.rs")
    expired = make_jwt(exp=int(NOW.timestamp()) - 3600)
    caplog.set_level(logging.DEBUG)
    url = "/fhir/Observation?patient=Patient/MRN-7731&value-quantity=gt6.1"
    for token in (minted, signed, expired, "lyt_" + "Z" * 43):
        app_client.get(url, headers=bearer(token))
    ours = "\n".join(r.getMessage() for r in caplog.records if r.name.startswith("lytestream"))
    assert "auth refused" in ours  # the refusals were logged...
    for secret in (minted, signed, expired, minted[4:], "MRN-7731", "6.1"):
        assert secret not in ours  # ...without the token, the patient or the value
