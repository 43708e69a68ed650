"""Which version of a result wins, whatever order the versions arrive in."""

from __future__ import annotations

import itertools
from datetime import UTC, datetime

from service.domain.versions import Decision, Held, decide

T9 = datetime(2026, 3, 2, 9, tzinfo=UTC)
T10 = datetime(2026, 3, 2, 10, tzinfo=UTC)


def held(status: str, issued: datetime | None = None, h: str = "a") -> Held:
    return Held(status=status, issued=issued, content_hash=h)


def test_nothing_held_creates() -> None:
    assert decide(None, status="final", issued=None, content_hash="a") is Decision.CREATE


def test_identical_content_is_unchanged() -> None:
    assert decide(held("final"), status="final", issued=None, content_hash="a") is Decision.UNCHANGED


def test_preliminary_never_replaces_final() -> None:
    assert decide(held("final"), status="preliminary", issued=T10, content_hash="b") is Decision.STALE


def test_amended_replaces_final() -> None:
    assert decide(held("final"), status="amended", issued=None, content_hash="b") is Decision.UPDATE


def test_nothing_replaces_entered_in_error() -> None:
    for status in ("preliminary", "final", "amended", "corrected"):
        assert decide(held("entered-in-error"), status=status, issued=T10, content_hash="b") is Decision.STALE


def test_older_issued_of_equal_rank_is_stale() -> None:
    assert decide(held("corrected", T10), status="corrected", issued=T9, content_hash="b") is Decision.STALE


def test_conditional_create_on_a_held_identifier_is_ignored() -> None:
    assert decide(held("final"), status="final", issued=None, content_hash="b", if_none_exist=True) is Decision.EXISTS


def test_any_arrival_order_ends_on_the_same_version() -> None:
    versions = [("preliminary", T9, "p"), ("final", T9, "f"), ("corrected", T10, "c")]
    finals = set()
    for order in itertools.permutations(versions):
        current: Held | None = None
        for status, issued, h in order:
            if decide(current, status=status, issued=issued, content_hash=h) in (Decision.CREATE, Decision.UPDATE):
                current = Held(status, issued, h)
        assert current is not None
        finals.add(current.content_hash)
    assert finals == {"c"}
