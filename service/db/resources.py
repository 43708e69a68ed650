"""Current rows and versions of the resources lytestream stores (Observation, MedicationAdministration).

Both follow one pattern: the business identifier is unique, the incoming version is decided against
the held one (service.domain.versions), and every new version is written as served to fhir_version.
Statements are batched: a Bundle of a hundred results costs a handful of round trips.
"""

from __future__ import annotations

import uuid
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import orjson
from sqlalchemy import Table, bindparam, insert, select, update
from sqlmodel import Session

from service.db.tables import FhirVersion, InsulinRecord, ObservationRecord, ReceivedRequest
from service.domain.versions import Decision, Held, decide

__all__ = ["Pending", "Written", "apply_versions", "record_request", "table_for"]

_TABLES: dict[str, Table] = {
    "Observation": ObservationRecord.__table__,  # type: ignore[attr-defined]
    "MedicationAdministration": InsulinRecord.__table__,  # type: ignore[attr-defined]
}
_VERSIONS: Table = FhirVersion.__table__  # type: ignore[attr-defined]
_REQUESTS: Table = ReceivedRequest.__table__  # type: ignore[attr-defined]


def table_for(resource_type: str) -> Table:
    return _TABLES[resource_type]


@dataclass
class Pending:
    """One incoming version, ready to be decided and written."""

    resource_type: str
    identifier: tuple[str, str]
    status: str
    issued: datetime | None
    content_hash: str
    row: dict[str, Any]  # column values except id, identifier, version_id, last_updated, content_hash
    resource: dict[str, Any]
    if_none_exist: bool = False


@dataclass
class Written:
    """What became of one Pending."""

    decision: Decision
    id: str
    version_id: int
    last_updated: datetime
    resource: bytes  # the current version as served
    previous_patient: str | None = None  # when a correction moved the result to another patient
    extra: dict[str, Any] = field(default_factory=dict)


def record_request(*, session: Session, interaction: str, body: bytes, now: datetime) -> int:
    """Keep the exact bytes of a request that changed something; returns its id."""
    result = session.execute(
        insert(_REQUESTS).values(received_at=now, interaction=interaction, body=body).returning(_REQUESTS.c.id)
    )
    return int(result.scalar_one())


def _held(session: Session, table: Table, identifiers: set[tuple[str, str]]) -> dict[tuple[str, str], Any]:
    """The held rows for these business identifiers.

    Queried as ``system = ? AND value IN (…)`` per system: a row-value ``IN`` would not use the unique
    index on SQLite and scan the table instead.
    """
    held: dict[tuple[str, str], Any] = {}
    by_system: dict[str, list[str]] = {}
    for system, value in identifiers:
        by_system.setdefault(system, []).append(value)
    cols = table.c
    columns = [cols.id, cols.identifier_system, cols.identifier_value, cols.status, cols.version_id,
               cols.content_hash, cols.patient_key, cols.last_updated,
               cols.issued if "issued" in cols else cols.last_updated.label("issued")]
    for system, values in sorted(by_system.items()):
        values.sort()
        for i in range(0, len(values), 500):
            rows = session.execute(select(*columns).where(cols.identifier_system == system,
                                                          cols.identifier_value.in_(values[i : i + 500])))
            for row in rows:
                held[(row.identifier_system, row.identifier_value)] = row
    return held


def served(resource: dict[str, Any], rid: str, version: int, when: datetime) -> bytes:
    body = dict(resource)
    body["id"] = rid
    body["meta"] = {"versionId": str(version), "lastUpdated": when.isoformat().replace("+00:00", "Z")}
    return orjson.dumps(body)


def apply_versions(
    *, session: Session, pending: Sequence[Pending], now: datetime, request_id: Any
) -> list[Written]:
    """Decide and write each pending version, in order; returns one Written per Pending.

    ``request_id`` is called with no argument the first time something is written, and its result
    links the new versions to the raw request (so unchanged resends store nothing).
    """
    by_type: dict[str, list[int]] = {}
    for i, p in enumerate(pending):
        by_type.setdefault(p.resource_type, []).append(i)
    results: dict[int, Written] = {}
    version_rows: list[dict[str, Any]] = []
    req_id: int | None = None
    for rtype, indexes in by_type.items():
        table = _TABLES[rtype]
        held = _held(session, table, {pending[i].identifier for i in indexes})
        state: dict[tuple[str, str], dict[str, Any]] = {
            k: {
                "id": r.id,
                "status": r.status,
                "version_id": r.version_id,
                "content_hash": r.content_hash,
                "issued": r.issued if rtype == "Observation" else None,
                "patient_key": r.patient_key,
                "last_updated": r.last_updated,
                "new": False,
                "dirty": False,
            }
            for k, r in held.items()
        }
        for i in indexes:
            p = pending[i]
            cur = state.get(p.identifier)
            h = Held(cur["status"], cur["issued"], cur["content_hash"]) if cur else None
            decision = decide(h, status=p.status, issued=p.issued, content_hash=p.content_hash,
                              if_none_exist=p.if_none_exist)
            if decision in (Decision.CREATE, Decision.UPDATE):
                if req_id is None:
                    req_id = request_id()
                previous = cur["patient_key"] if cur else None
                version = cur["version_id"] + 1 if cur else 1
                rid = cur["id"] if cur else str(uuid.uuid4())
                cur = {
                    **p.row,
                    "id": rid,
                    "identifier_system": p.identifier[0],
                    "identifier_value": p.identifier[1],
                    "version_id": version,
                    "last_updated": now,
                    "content_hash": p.content_hash,
                    # What the next decision on this identifier in the same request reads (a batch may carry
                    # one resource twice); MedicationAdministration rows have no issued column.
                    "status": p.status,
                    "issued": p.issued,
                    "patient_key": p.row["patient_key"],
                    "new": cur["new"] if cur else True,
                    "dirty": True,
                }
                state[p.identifier] = cur
                body = served(p.resource, rid, version, now)
                version_rows.append(
                    {"resource_type": rtype, "id": rid, "version_id": version, "last_updated": now,
                     "request_id": req_id, "resource": body}
                )
                moved = previous if previous and previous != p.row["patient_key"] else None
                results[i] = Written(decision, rid, version, now, body, previous_patient=moved)
            else:
                assert cur is not None
                results[i] = Written(decision, cur["id"], cur["version_id"], cur["last_updated"], b"")
        _flush(session, table, state)
    if version_rows:
        session.execute(insert(_VERSIONS), version_rows)
    return [results[i] for i in range(len(pending))]


def _flush(session: Session, table: Table, state: dict[tuple[str, str], dict[str, Any]]) -> None:
    columns = set(table.c.keys())
    creates = [{k: v for k, v in s.items() if k in columns} for s in state.values() if s["dirty"] and s["new"]]
    updates = [
        {**{k: v for k, v in s.items() if k in columns}, "_id": s["id"]}
        for s in state.values()
        if s["dirty"] and not s["new"]
    ]
    if creates:
        session.execute(insert(table), creates)
    if updates:
        # Parameter keys that name columns become the SET clause of the executemany.
        rows = [{k: v for k, v in u.items() if k != "id"} for u in updates]
        session.connection().execute(update(table).where(table.c.id == bindparam("_id")), rows)
