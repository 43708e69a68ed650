"""Board session cookies: what a cookie proves, and what it cannot be made to prove."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest

from service.auth.principal import Principal
from service.auth.scopes import Grant
from service.board.session import SessionInvalid, derive_key, new_session, open_cookie, seal_cookie

NOW = datetime(2026, 3, 2, 12, 0, tzinfo=UTC)
PRINCIPAL = Principal(client_id="ward-tablet", grants=(Grant("Flag", frozenset("rsu")),), kind="minted", token_id=7)
KEY = derive_key("a site secret")


def test_a_sealed_session_opens_to_the_same_caller_and_person() -> None:
    session = new_session(PRINCIPAL, "Nurse A", NOW, hours=8)
    opened = open_cookie(seal_cookie(session, KEY), KEY, NOW + timedelta(hours=7))
    assert opened.principal == PRINCIPAL and opened.person == "Nurse A" and opened.csrf == session.csrf
    assert opened.principal.allows("Flag", "u") and not opened.principal.allows("Observation", "r")


def test_an_expired_session_does_not_open() -> None:
    cookie = seal_cookie(new_session(PRINCIPAL, "Nurse A", NOW, hours=8), KEY)
    with pytest.raises(SessionInvalid, match="expired"):
        open_cookie(cookie, KEY, NOW + timedelta(hours=8))


def test_a_session_sealed_with_another_key_does_not_open() -> None:
    cookie = seal_cookie(new_session(PRINCIPAL, "Nurse A", NOW, hours=8), derive_key("another site"))
    with pytest.raises(SessionInvalid):
        open_cookie(cookie, KEY, NOW)


def test_the_same_secret_gives_every_replica_the_same_key_and_no_secret_a_private_one() -> None:
    assert derive_key("s") == derive_key("s")
    assert derive_key(None) != derive_key(None)


@pytest.mark.parametrize("cookie", [None, "", "no-dot", "a.b.c", "x" * 9000, "e30.AAAA"])
def test_garbage_is_no_session(cookie: str | None) -> None:
    with pytest.raises(SessionInvalid):
        open_cookie(cookie, KEY, NOW)


def test_widening_the_grants_in_the_cookie_breaks_the_signature() -> None:
    import base64

    import orjson

    cookie = seal_cookie(new_session(PRINCIPAL, "Nurse A", NOW, hours=8), KEY)
    payload, signature = cookie.split(".")
    data = orjson.loads(base64.urlsafe_b64decode(payload + "=" * (-len(payload) % 4)))
    data["g"] = [["*", "cruds"]]
    forged = base64.urlsafe_b64encode(orjson.dumps(data)).rstrip(b"=").decode()
    with pytest.raises(SessionInvalid):
        open_cookie(f"{forged}.{signature}", KEY, NOW)


def test_the_csrf_check_accepts_only_the_sessions_own_token() -> None:
    session = new_session(PRINCIPAL, "Nurse A", NOW, hours=8)
    assert session.csrf_ok(session.csrf)
    assert not session.csrf_ok(None) and not session.csrf_ok("") and not session.csrf_ok(session.csrf + "x")


def test_a_session_never_outlives_the_jwt_that_opened_it() -> None:
    from dataclasses import replace

    short = replace(PRINCIPAL, kind="jwt", token_id=None, expires=NOW + timedelta(minutes=5))
    session = new_session(short, "Nurse A", NOW, hours=8)
    assert session.expires == NOW + timedelta(minutes=5)
    with pytest.raises(SessionInvalid, match="expired"):
        open_cookie(seal_cookie(session, KEY), KEY, NOW + timedelta(minutes=6))
