"""BALP audit of reads that return patient data: one AuditEvent per patient whose resources were returned.

Flags, Observations and MedicationAdministrations all name their patient in ``subject``; the events
list the exact versions returned, so an analyst can say who saw which result when.
"""

from __future__ import annotations

import orjson

from service.api.context import AppContext
from service.db.audit import record_audit
from service.db.reads import patient_key_for
from service.fhir.audit_render import AuditFacts, Requester
from service.fhir.references import served_subject_alias

__all__ = ["audit_patient_access"]


def audit_patient_access(ctx: AppContext, who: Requester, rows: list[bytes], *, subtype: str,
                         query: str | None = None, operation: str | None = None) -> None:
    """One AuditEvent per patient among ``rows`` (stored resource JSON); none returned leaves one Query event."""
    by_patient: dict[str, list[str]] = {}
    for row in rows:
        resource = orjson.loads(row)
        key = orjson.dumps(resource["subject"], option=orjson.OPT_SORT_KEYS).decode()
        ref = f"{resource['resourceType']}/{resource['id']}/_history/{resource['meta']['versionId']}"
        by_patient.setdefault(key, []).append(ref)
    now = ctx.clock.now()
    with ctx.db.session(write=True) as session:
        events: list[tuple[AuditFacts, str | None]] = []
        if not by_patient:
            events.append((AuditFacts(subtype=subtype, recorded=now, requester=who, query=query,
                                      operation=operation), None))
        for subject_json, refs in by_patient.items():
            subject = orjson.loads(subject_json)
            alias = served_subject_alias(subject)
            facts = AuditFacts(subtype=subtype, recorded=now, requester=who, patient=subject, what=refs,
                               query=query, operation=operation)
            events.append((facts, patient_key_for(session=session, alias=alias)))
        record_audit(session=session, events=events, base_url=ctx.settings.base_url)
