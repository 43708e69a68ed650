"""JWT access tokens checked against the authorisation server's JWKS (fetched through respx)."""

from __future__ import annotations

import json
from typing import Any

import httpx
import jwt
import pytest
import respx
from cryptography.hazmat.primitives import serialization

from service.auth.failures import AuthFailure
from service.auth.jwt import JwtVerifier
from service.auth.scopes import Grant
from service.auth.settings import AuthSettings

from .conftest import AUDIENCE, ISSUER, NOW, Keys, MakeJwt, Ticker
from .forge import hmac_signed, unsigned


@pytest.fixture
def verifier(jwt_settings: AuthSettings, ticker: Ticker, jwks_route: respx.Route) -> JwtVerifier:
    return JwtVerifier(jwt_settings, client=httpx.Client(), monotonic=ticker)


def refusal(verifier: JwtVerifier, token: str) -> AuthFailure:
    with pytest.raises(AuthFailure) as info:
        verifier.verify(token, now=NOW)
    return info.value


def test_a_valid_rs256_token_yields_its_client_and_grants(verifier: JwtVerifier, make_jwt: MakeJwt) -> None:
    principal = verifier.verify(make_jwt(), now=NOW)
    assert principal.client_id == "lab-interface-engine"
    assert principal.kind == "jwt"
    assert principal.grants == (Grant("Observation", frozenset("cu")),)


def test_a_valid_es256_token_is_accepted(verifier: JwtVerifier, make_jwt: MakeJwt) -> None:
    assert verifier.verify(make_jwt(alg="ES256", kid="ec-1"), now=NOW).client_id == "lab-interface-engine"


def test_scp_as_a_list_is_accepted_in_place_of_scope(verifier: JwtVerifier, make_jwt: MakeJwt) -> None:
    token = make_jwt(scope=None, scp=["system/Flag.rs", "system/Observation.rs"])
    assert verifier.verify(token, now=NOW).grants == (Grant("Flag", frozenset("rs")),
                                                      Grant("Observation", frozenset("rs")))


def test_the_admin_scope_in_a_jwt_names_an_admin(verifier: JwtVerifier, make_jwt: MakeJwt) -> None:
    assert verifier.verify(make_jwt(scope="system/Subscription.rs lytestream/admin"), now=NOW).admin is True
    assert verifier.verify(make_jwt(scope="system/*.cruds"), now=NOW).admin is False


def test_a_token_without_scope_is_invalid(verifier: JwtVerifier, make_jwt: MakeJwt) -> None:
    assert refusal(verifier, make_jwt(scope=None)).description == "the token carries no scope claim"


def test_audience_may_be_a_list_containing_ours(verifier: JwtVerifier, make_jwt: MakeJwt) -> None:
    assert verifier.verify(make_jwt(aud=["https://other.test", AUDIENCE]), now=NOW).kind == "jwt"


@pytest.mark.parametrize(
    ("changes", "description"),
    [
        ({"aud": "https://other.test/fhir"}, "the token is not meant for this service (aud)"),
        ({"aud": None}, "the token is not meant for this service (aud)"),
        ({"iss": "https://auth.elsewhere.test"},
         "the token was not issued by the trusted authorisation server"),
        ({"exp": None}, "the token has no valid exp claim"),
        ({"exp": "tomorrow"}, "the token has no valid exp claim"),
        ({"nbf": int(NOW.timestamp()) + 120}, "the token is not valid yet (nbf)"),
        ({"iat": int(NOW.timestamp()) + 86_400}, "the token was issued in the future (iat)"),
        ({"iat": int(NOW.timestamp()) + 31}, "the token was issued in the future (iat)"),
        ({"iat": "yesterday"}, "the token has no valid iat claim"),
        ({"client_id": None, "sub": None}, "the token names no client (client_id or sub)"),
    ],
)
def test_claims_that_do_not_fit_are_refused(verifier: JwtVerifier, make_jwt: MakeJwt, changes: dict[str, Any],
                                            description: str) -> None:
    failure = refusal(verifier, make_jwt(**changes))
    assert (failure.status, failure.error, failure.description) == (401, "invalid_token", description)


def test_expiry_is_checked_against_the_given_time_with_leeway(verifier: JwtVerifier,
                                                             make_jwt: MakeJwt) -> None:
    at = int(NOW.timestamp())
    assert verifier.verify(make_jwt(exp=at - 20), now=NOW).kind == "jwt"  # within the 30 s leeway
    failure = refusal(verifier, make_jwt(exp=at - 31))
    assert (failure.status, failure.issue_code, failure.error) == (401, "expired", "invalid_token")


def test_issue_time_may_be_ahead_by_the_leeway_only(verifier: JwtVerifier, make_jwt: MakeJwt) -> None:
    # A clock a little ahead at the authorisation server is normal; a day ahead is a forged or broken token.
    at = int(NOW.timestamp())
    assert verifier.verify(make_jwt(iat=at + 30, nbf=None), now=NOW).kind == "jwt"
    assert refusal(verifier, make_jwt(iat=at + 86_400, nbf=None)).status == 401


def test_a_signature_by_another_key_is_refused(verifier: JwtVerifier, make_jwt: MakeJwt, keys: Keys) -> None:
    failure = refusal(verifier, make_jwt(key=keys.rogue))  # claims kid rsa-1, signed by a key never published
    assert failure.description == "the token's signature does not verify"


def test_alg_none_is_refused(verifier: JwtVerifier, claims: dict[str, Any]) -> None:
    token = unsigned({"alg": "none", "typ": "at+jwt", "kid": "rsa-1"}, claims)
    assert refusal(verifier, token).description == "the token's signing algorithm is not accepted"


@pytest.mark.parametrize("secret_form", ["pem", "jwk"])
def test_hs256_signed_with_the_public_key_is_refused(verifier: JwtVerifier, claims: dict[str, Any],
                                                     keys: Keys, secret_form: str) -> None:
    public = keys.rsa.public_key()
    secret = (public.public_bytes(serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo)
              if secret_form == "pem" else json.dumps(keys.jwks()["keys"][0]).encode())
    token = hmac_signed({"alg": "HS256", "typ": "at+jwt", "kid": "rsa-1"}, claims, secret)
    assert refusal(verifier, token).description == "the token's signing algorithm is not accepted"


def test_hs256_refused_even_if_someone_allowed_it_in_settings() -> None:
    with pytest.raises(ValueError, match="HS256"):
        AuthSettings(mode="jwt", issuer=ISSUER, audience=AUDIENCE, jwks_url="https://a.test/jwks",
                     algorithms=("RS256", "HS256"))
    with pytest.raises(ValueError, match="none"):
        AuthSettings(mode="jwt", issuer=ISSUER, audience=AUDIENCE, jwks_url="https://a.test/jwks",
                     algorithms=("none",))


def test_an_algorithm_the_key_was_not_made_for_is_refused(verifier: JwtVerifier, make_jwt: MakeJwt,
                                                          keys: Keys) -> None:
    # An ES256 token naming the RSA key's kid: the header algorithm must fit the key type.
    failure = refusal(verifier, make_jwt(alg="ES256", kid="rsa-1", key=keys.ec))
    assert failure.description == "the token's algorithm does not match its signing key"


def test_an_algorithm_outside_the_allow_list_is_refused(verifier: JwtVerifier, make_jwt: MakeJwt) -> None:
    failure = refusal(verifier, make_jwt(alg="RS512"))
    assert failure.description == "the token's signing algorithm is not accepted"


def test_a_token_that_is_not_an_access_token_is_refused(verifier: JwtVerifier, make_jwt: MakeJwt) -> None:
    # RFC 9068 §4: the resource server checks typ is at+jwt (keeps ID tokens out).
    assert "typ must be at+jwt" in refusal(verifier, make_jwt(typ="JWT")).description


def test_malformed_tokens_are_invalid(verifier: JwtVerifier) -> None:
    for token in ("abc", "abc.def.ghi", "e30.e30"):
        assert refusal(verifier, token).description == "the token is not a well-formed JWT"


def test_jwks_is_fetched_once_and_reused_within_its_ttl(verifier: JwtVerifier, make_jwt: MakeJwt,
                                                        jwks_route: respx.Route, ticker: Ticker) -> None:
    for _ in range(3):
        verifier.verify(make_jwt(), now=NOW)
    assert jwks_route.call_count == 1
    ticker.at += 601  # past the default 600 s TTL
    verifier.verify(make_jwt(), now=NOW)
    assert jwks_route.call_count == 2


def test_an_unknown_kid_refetches_once_then_is_rate_limited(verifier: JwtVerifier, make_jwt: MakeJwt,
                                                             keys: Keys, jwks_route: respx.Route,
                                                             ticker: Ticker) -> None:
    verifier.verify(make_jwt(), now=NOW)
    assert jwks_route.call_count == 1
    # The authorisation server rotates in a new key; a token signed with it arrives.
    jwks_route.mock(return_value=httpx.Response(200, json=keys.jwks(include=("rsa-1", "ec-1", "rsa-2"))))
    ticker.at += 31  # past the minimum refetch interval
    assert verifier.verify(make_jwt(kid="rsa-2", key=keys.rogue), now=NOW).kind == "jwt"
    assert jwks_route.call_count == 2
    # A kid nobody publishes: no refetch inside the interval, and exactly one after it.
    failure = refusal(verifier, make_jwt(kid="made-up"))
    assert failure.description == "the token was signed with a key the authorisation server does not publish"
    assert jwks_route.call_count == 2
    ticker.at += 31
    refusal(verifier, make_jwt(kid="made-up"))
    assert jwks_route.call_count == 3


def test_a_jwks_outage_keeps_the_last_keys_for_a_while_then_answers_503(
        verifier: JwtVerifier, make_jwt: MakeJwt, jwks_route: respx.Route, ticker: Ticker) -> None:
    verifier.verify(make_jwt(), now=NOW)
    jwks_route.mock(return_value=httpx.Response(500))
    ticker.at += 601
    assert verifier.verify(make_jwt(), now=NOW).kind == "jwt"  # stale but within one more TTL
    ticker.at += 600
    assert refusal(verifier, make_jwt()).status == 503


def test_a_jwks_that_never_loads_answers_503(jwt_settings: AuthSettings, make_jwt: MakeJwt) -> None:
    with respx.mock() as mock:
        mock.get(jwt_settings.jwks_url).mock(side_effect=httpx.ConnectError("refused"))
        verifier = JwtVerifier(jwt_settings, client=httpx.Client())
        failure = refusal(verifier, make_jwt())
    assert (failure.status, failure.issue_code) == (503, "transient")
    assert failure.www_authenticate("lytestream") is None  # not a Bearer problem: no challenge


def test_symmetric_private_and_encryption_keys_in_a_jwks_are_never_used(jwt_settings: AuthSettings,
                                                                        keys: Keys) -> None:
    jwks = keys.jwks(include=("rsa-1", "ec-1"))
    jwks["keys"][1]["use"] = "enc"
    private = json.loads(jwt.algorithms.RSAAlgorithm.to_jwk(keys.rogue))  # includes "d"
    jwks["keys"] += [{"kty": "oct", "kid": "oct-1", "k": "c2VjcmV0"}, {**private, "kid": "priv-1"}]
    with respx.mock() as mock:
        mock.get(jwt_settings.jwks_url).mock(return_value=httpx.Response(200, json=jwks))
        cache = JwtVerifier(jwt_settings, client=httpx.Client()).keys
        assert cache.find("rsa-1") is not None
        assert [cache.find(kid) for kid in ("ec-1", "oct-1", "priv-1")] == [None, None, None]
