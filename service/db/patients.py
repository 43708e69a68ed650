"""Patient identity: aliases → one internal key. Keyword-only, session first, never commits."""

from __future__ import annotations

import uuid
from collections.abc import Sequence

from sqlalchemy import select, text
from sqlalchemy.dialects.postgresql import insert as pg_insert
from sqlalchemy.dialects.sqlite import insert as sqlite_insert
from sqlmodel import Session

from service.db.tables import PatientAlias

__all__ = ["IdentityConflict", "patient_identifiers", "resolve_patients"]

_ALIAS = PatientAlias.__table__  # type: ignore[attr-defined]


class IdentityConflict(Exception):
    """Two aliases of one reference already name two different patients."""

    def __init__(self, index: int, aliases: tuple[str, ...]) -> None:
        super().__init__(f"aliases {aliases} name different patients")
        self.index = index
        self.aliases = aliases


def _insert(session: Session):  # type: ignore[no-untyped-def]
    dialect = session.get_bind().dialect.name
    return (pg_insert if dialect == "postgresql" else sqlite_insert)(_ALIAS)


def resolve_patients(*, session: Session, groups: Sequence[tuple[str, ...]]) -> list[str]:
    """One patient key per group of aliases; unknown patients get a new key, new aliases are linked.

    Raises IdentityConflict (with the group's index) when a group's known aliases disagree.

    PostgreSQL: the aliases not yet known are locked first (transaction-scoped advisory locks, in
    sorted order, so two requests introducing the same new patients queue instead of deadlocking on
    each other's uncommitted alias rows) and looked up again once held: whoever comes second sees
    the first one's links. Known aliases need no lock: an alias, once linked, never changes.
    """
    wanted = {a for g in groups for a in g}
    known = _lookup(session, wanted)
    new = wanted - known.keys()
    if new and session.get_bind().dialect.name == "postgresql":
        for alias in sorted(new):
            session.execute(text("SELECT pg_advisory_xact_lock(hashtextextended(:k, 0))"), {"k": f"alias:{alias}"})
        known |= _lookup(session, new)
    keys: list[str] = []
    pending: dict[str, str] = {}
    for index, group in enumerate(groups):
        found = {known[a] for a in group if a in known} | {pending[a] for a in group if a in pending}
        if len(found) > 1:
            raise IdentityConflict(index, group)
        key = found.pop() if found else uuid.uuid4().hex
        for alias in group:
            if alias not in known and alias not in pending:
                pending[alias] = key
        keys.append(key)
    if pending:
        stmt = _insert(session).on_conflict_do_nothing(index_elements=["alias"])
        # In alias order, the same order as the locks (one global order for the unique index too).
        session.execute(stmt, [{"alias": a, "patient_key": pending[a]} for a in sorted(pending)])
        # A guard (the locks make it moot): if an alias was linked first elsewhere, redo with what won.
        if session.get_bind().dialect.name != "sqlite":
            won = _lookup(session, set(pending))
            if any(won[a] != k for a, k in pending.items()):
                return resolve_patients(session=session, groups=groups)
    return keys


def _lookup(session: Session, aliases: set[str]) -> dict[str, str]:
    found: dict[str, str] = {}
    items = sorted(aliases)
    for i in range(0, len(items), 500):
        chunk = items[i : i + 500]
        rows = session.execute(select(_ALIAS.c.alias, _ALIAS.c.patient_key).where(_ALIAS.c.alias.in_(chunk)))
        found.update({a: k for a, k in rows})
    return found


def patient_identifiers(*, session: Session, patient_keys: Sequence[str]) -> dict[str, list[str]]:
    """Every name the feeds used for each patient, as sent: identifiers ("system|value") first, then
    literal references ("Patient/x"), each group sorted. A patient with no alias is absent."""
    found: dict[str, list[str]] = {}
    items = sorted(set(patient_keys))
    for i in range(0, len(items), 500):
        for alias, key in session.execute(select(_ALIAS.c.alias, _ALIAS.c.patient_key)
                                          .where(_ALIAS.c.patient_key.in_(items[i:i + 500]))):
            found.setdefault(key, []).append(str(alias))
    # An alias is "id:<system>|<value>" or "ref:<reference>"; "id:" sorts before "ref:".
    return {k: [a.split(":", 1)[1] for a in sorted(v)] for k, v in found.items()}
