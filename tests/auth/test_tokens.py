"""Tokens minted by the service: only their hash is kept, and revocation takes effect at once."""

from __future__ import annotations

import hashlib
from datetime import timedelta

import pytest
from sqlmodel import select

from service.auth.scopes import Grant, ScopeError
from service.auth.tables import ApiToken
from service.auth.tokens import TokenError, active_tokens, mint, revoke, verify_minted
from service.db.engine import Database

from .conftest import NOW


def test_create_verify_revoke_then_refused(db: Database) -> None:
    with db.session(write=True) as s:
        token = mint(s, client="lab-interface-engine", scope="system/Observation.cu", now=NOW)
    with db.session(write=True) as s:
        principal = verify_minted(s, token=token, now=NOW + timedelta(minutes=1))
    assert principal is not None
    assert principal.client_id == "lab-interface-engine"
    assert principal.kind == "minted"
    assert principal.grants == (Grant("Observation", frozenset("cu")),)
    with db.session(write=True) as s:
        assert revoke(s, client="lab-interface-engine", now=NOW + timedelta(minutes=2)) == 1
    with db.session() as s:
        assert verify_minted(s, token=token, now=NOW + timedelta(minutes=3)) is None


def test_the_token_is_prefixed_high_entropy_and_never_stored(db: Database) -> None:
    with db.session(write=True) as s:
        first = mint(s, client="ward-dashboard", scope="system/Flag.rs", now=NOW)
        second = mint(s, client="ward-dashboard", scope="system/Flag.rs", now=NOW)
    assert first.startswith("lyt_") and len(first) == 4 + 43  # token_urlsafe(32): 32 bytes → 43 characters
    assert first != second
    with db.session() as s:
        rows = list(s.exec(select(ApiToken)))
    assert {r.token_hash for r in rows} == {hashlib.sha256(t.encode()).hexdigest() for t in (first, second)}
    for row in rows:
        assert first not in repr(row.model_dump()) and second not in repr(row.model_dump())


def test_an_unknown_or_tampered_token_is_refused(db: Database) -> None:
    with db.session(write=True) as s:
        token = mint(s, client="ward-dashboard", scope="system/Flag.rs", now=NOW)
    tampered = token[:-1] + ("A" if token[-1] != "A" else "B")
    with db.session() as s:
        assert verify_minted(s, token=tampered, now=NOW) is None
        assert verify_minted(s, token="lyt_short", now=NOW) is None
        assert verify_minted(s, token=token.removeprefix("lyt_"), now=NOW) is None


def test_verification_records_last_use_unless_told_not_to(db: Database) -> None:
    with db.session(write=True) as s:
        token = mint(s, client="ward-dashboard", scope="system/Flag.rs", now=NOW)
    with db.session() as s:
        assert verify_minted(s, token=token, now=NOW + timedelta(hours=1), touch=False) is not None
    with db.session() as s:
        assert active_tokens(s, client="ward-dashboard")[0].last_used_at is None
    with db.session(write=True) as s:
        verify_minted(s, token=token, now=NOW + timedelta(hours=2))
    with db.session() as s:
        assert active_tokens(s, client="ward-dashboard")[0].last_used_at == NOW + timedelta(hours=2)


def test_revoke_by_id_leaves_the_clients_other_tokens(db: Database) -> None:
    with db.session(write=True) as s:
        keep = mint(s, client="ward-dashboard", scope="system/Flag.rs", now=NOW)
        drop = mint(s, client="ward-dashboard", scope="system/Flag.rs", now=NOW)
        drop_id = s.exec(select(ApiToken.id).order_by(ApiToken.id.desc())).first()  # type: ignore[union-attr]
    with db.session(write=True) as s:
        assert revoke(s, token_id=drop_id, now=NOW) == 1
        assert revoke(s, token_id=drop_id, now=NOW) == 0  # already revoked
    with db.session() as s:
        assert verify_minted(s, token=keep, now=NOW, touch=False) is not None
        assert verify_minted(s, token=drop, now=NOW, touch=False) is None


def test_revoking_a_client_revokes_all_of_its_tokens_and_no_others(db: Database) -> None:
    with db.session(write=True) as s:
        a1 = mint(s, client="feed-a", scope="system/Observation.cu", now=NOW)
        a2 = mint(s, client="feed-a", scope="system/Observation.cu", now=NOW)
        b = mint(s, client="feed-b", scope="system/Observation.cu", now=NOW)
    with db.session(write=True) as s:
        assert revoke(s, client="feed-a", now=NOW) == 2
    with db.session() as s:
        refused = [verify_minted(s, token=t, now=NOW, touch=False) is None for t in (a1, a2, b)]
    assert refused == [True, True, False]


def test_v1_scopes_are_stored_in_their_v2_form(db: Database) -> None:
    with db.session(write=True) as s:
        mint(s, client="feed-a", scope="system/Observation.write", now=NOW)  # SMART-2: .write ⇒ .cud
    with db.session() as s:
        assert active_tokens(s, client="feed-a")[0].scope == "system/Observation.cud"


@pytest.mark.parametrize("scope", ["patient/Observation.rs", "system/Observation.dus", "openid", "  "])
def test_minting_refuses_a_scope_that_would_grant_nothing(db: Database, scope: str) -> None:
    with db.session(write=True) as s, pytest.raises(ScopeError):
        mint(s, client="feed-a", scope=scope, now=NOW)


@pytest.mark.parametrize("client", ["", "has space", "-leading-dash", "x" * 65, "naïve"])
def test_minting_refuses_a_bad_client_name(db: Database, client: str) -> None:
    with db.session(write=True) as s, pytest.raises(TokenError):
        mint(s, client=client, scope="system/Flag.rs", now=NOW)


def test_revoke_needs_exactly_one_selector_and_aware_time(db: Database) -> None:
    with db.session(write=True) as s:
        with pytest.raises(TokenError):
            revoke(s, now=NOW)
        with pytest.raises(TokenError):
            revoke(s, now=NOW, client="a", token_id=1)
        with pytest.raises(ValueError, match="naive"):
            revoke(s, now=NOW.replace(tzinfo=None), client="a")


def test_a_minted_admin_scope_is_kept_and_named_on_the_principal(db: Database) -> None:
    with db.session(write=True) as s:
        token = mint(s, client="ops", scope="system/Subscription.rs lytestream/admin", now=NOW)
    with db.session() as s:
        principal = verify_minted(s, token=token, now=NOW, touch=False)
    assert principal is not None and principal.admin is True
    with db.session(write=True) as s:
        plain = mint(s, client="feed-a", scope="system/*.cruds", now=NOW)
    with db.session() as s:
        other = verify_minted(s, token=plain, now=NOW, touch=False)
    assert other is not None and other.admin is False
