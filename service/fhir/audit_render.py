"""AuditEvents after the IHE Basic Audit Log Patterns (BALP). Pure: every input is passed in.

One AuditEvent per patient for reads and searches that return patient data (BALP PatientQuery /
PatientRead), one per ingest request (BALP Create, with counts and no patient data), one per
acknowledgement and per subscription change. The service itself is the destination agent.
"""

from __future__ import annotations

import base64
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from service.fhir.flag_render import CANONICAL_BASE
from service.fhir.render import fhir_instant

__all__ = ["AuditFacts", "Requester", "audit_event"]

BALP = "https://profiles.ihe.net/ITI/BALP/StructureDefinition"
_DCM = "http://dicom.nema.org/resources/ontology/DCM"
_ENTITY_TYPE = "http://terminology.hl7.org/CodeSystem/audit-entity-type"
_OBJECT_ROLE = "http://terminology.hl7.org/CodeSystem/object-role"
CLIENT_SYSTEM = f"{CANONICAL_BASE}/client-id"
_ACTIONS = {"create": "C", "update": "U", "read": "R", "vread": "R", "search-type": "E", "history-instance": "R",
            "transaction": "C", "batch": "C", "operation": "E", "delete": "D"}
# BALP profile per interaction: (with a patient subject, without one).
_PROFILES = {"read": ("PatientRead", "Read"), "vread": ("PatientRead", "Read"),
             "history-instance": ("PatientRead", "Read"), "search-type": ("PatientQuery", "Query"),
             "update": ("PatientUpdate", "Update"), "delete": ("PatientDelete", "Delete")}
# Events of ours that are no RESTful interaction, and so claim no BALP profile. dropped-code: a
# request's results under a likely mistyped code were not stored (counted per client). purge: the
# retention period deleted raw requests and AuditEvents (counted; service/retention.py).
_OWN_SUBTYPES = {"dropped-code": "C", "purge": "D"}
# Our operations, by the RESTful interaction each amounts to: $acknowledge writes a new Flag version;
# the others only read.
_OPERATION_KIND = {"$acknowledge": "update", "$summary": "search-type", "$refusals": "search-type",
                   "$events": "search-type"}


@dataclass(frozen=True, slots=True)
class Requester:
    """Who asked: the token's client and where the request came from."""

    client: str
    address: str | None
    request_id: str
    principal: Any = None  # the authenticated caller (service.auth.principal.Principal), for scope checks


@dataclass(frozen=True, slots=True)
class AuditFacts:
    """One auditable interaction."""

    subtype: str  # restful-interaction code (create, read, search-type, transaction, batch…) or "operation"
    recorded: datetime
    requester: Requester
    outcome: str = "0"  # 0 success, 4 minor failure, 8 serious failure
    outcome_desc: str | None = None  # why it failed, in words of ours (never request data)
    refused: bool = False  # access was refused: BALP shape, but none of its "successful …" profiles claimed
    patient: Mapping[str, Any] | None = None  # FHIR Reference of the one patient this event is about
    what: Sequence[str] = ()  # references of the resources read, written or acted on
    query: str | None = None  # "GET Flag?patient=…" for searches
    operation: str | None = None  # e.g. "$acknowledge"
    details: Mapping[str, str] = field(default_factory=dict)  # counts and the like; never values


def audit_event(f: AuditFacts, *, base_url: str) -> dict[str, Any]:
    if f.subtype == "disclose":
        return _disclosure(f, base_url=base_url)
    kind = _OPERATION_KIND.get(f.operation, "create") if f.operation else f.subtype
    with_patient, without = _PROFILES.get(kind, ("PatientCreate", "Create"))
    profile = with_patient if f.patient else without
    subtype = [{"system": "http://hl7.org/fhir/restful-interaction", "code": f.subtype}]
    if f.subtype in _OWN_SUBTYPES:
        subtype = [{"system": f"{CANONICAL_BASE}/CodeSystem/audit-subtype", "code": f.subtype}]
    if f.operation:
        subtype = [{"system": f"{CANONICAL_BASE}/CodeSystem/operation", "code": f.operation.lstrip("$")}]
    client_agent: dict[str, Any] = {
        "type": {"coding": [{"system": _DCM, "code": "110153", "display": "Source Role ID"}]},
        "who": {"identifier": {"system": CLIENT_SYSTEM, "value": f.requester.client}},
        "requestor": True,
    }
    if f.requester.address:
        client_agent["network"] = {"address": f.requester.address, "type": "2"}
    entities: list[dict[str, Any]] = []
    if f.query:
        entities.append({
            "type": {"system": _ENTITY_TYPE, "code": "2", "display": "System Object"},
            "role": {"system": _OBJECT_ROLE, "code": "24", "display": "Query"},
            "description": f.query,
            "query": base64.b64encode(f.query.encode()).decode(),
        })
    for ref in f.what:
        entities.append({
            "type": {"system": _ENTITY_TYPE, "code": "2", "display": "System Object"},
            "role": {"system": _OBJECT_ROLE, "code": "4", "display": "Domain Resource"},
            "what": {"reference": ref},
        })
    if f.patient:
        entities.append({
            "type": {"system": _ENTITY_TYPE, "code": "1", "display": "Person"},
            "role": {"system": _OBJECT_ROLE, "code": "1", "display": "Patient"},
            "what": dict(f.patient),
        })
    if f.details:
        entities.append({
            "type": {"system": _ENTITY_TYPE, "code": "2", "display": "System Object"},
            "description": "request summary",
            "detail": [{"type": k, "valueString": v} for k, v in sorted(f.details.items())],
        })
    if f.requester.request_id:  # none for what the service does on its own (a delivery answers no request)
        entities.append(_request_id(f.requester.request_id))
    event: dict[str, Any] = {
        "resourceType": "AuditEvent",
        "meta": {"profile": [f"{BALP}/IHE.BasicAudit.{profile}"]},
        "type": {"system": "http://terminology.hl7.org/CodeSystem/audit-event-type", "code": "rest",
                 "display": "Restful Operation"},
        "subtype": subtype,
        "action": _ACTIONS.get(kind) or _OWN_SUBTYPES.get(kind, "E"),
        "recorded": fhir_instant(f.recorded),
        "outcome": f.outcome,
        "agent": [
            client_agent,
            {"type": {"coding": [{"system": _DCM, "code": "110152", "display": "Destination Role ID"}]},
             "who": {"reference": "Device/lytestream"}, "requestor": False,
             "network": {"address": base_url, "type": "5"}},
        ],
        "source": _SOURCE,
        "entity": entities,
    }
    if f.outcome_desc:
        event["outcomeDesc"] = f.outcome_desc
    if f.refused or f.subtype in _OWN_SUBTYPES:
        del event["meta"]  # BALP's profiles describe successful interactions; this one was refused
    return event


_SOURCE = {"observer": {"reference": "Device/lytestream", "display": "lytestream"},
           "type": [{"system": "http://terminology.hl7.org/CodeSystem/security-source-type", "code": "4",
                     "display": "Application Server"}]}


def _request_id(value: str) -> dict[str, Any]:
    return {"type": {"system": "https://profiles.ihe.net/ITI/BALP/CodeSystem/BasicAuditEntityType",
                     "code": "XrequestId"},
            "what": {"identifier": {"value": value}}}


def _disclosure(f: AuditFacts, *, base_url: str) -> dict[str, Any]:
    """A notification that carried a patient's Flag to a subscriber (BALP PrivacyDisclosure.Source).

    The service is the source and sends of its own accord; the recipient is the subscription's owner,
    at its endpoint's origin (``requester.address``: never the path or query, which may hold secrets).
    """
    recipient: dict[str, Any] = {
        "type": {"coding": [{"system": "http://terminology.hl7.org/CodeSystem/v3-ParticipationType",
                             "code": "IRCP", "display": "information recipient"}]},
        "who": {"identifier": {"system": CLIENT_SYSTEM, "value": f.requester.client}},
        "requestor": True,  # it asked for these notifications when it made the subscription
    }
    if f.requester.address:
        recipient["network"] = {"address": f.requester.address, "type": "5"}
    entities: list[dict[str, Any]] = [
        {"type": {"system": _ENTITY_TYPE, "code": "2", "display": "System Object"},
         "role": {"system": _OBJECT_ROLE, "code": "4", "display": "Domain Resource"},
         "what": {"reference": ref}}
        for ref in f.what
    ]
    if f.patient:
        entities.append({"type": {"system": _ENTITY_TYPE, "code": "1", "display": "Person"},
                         "role": {"system": _OBJECT_ROLE, "code": "1", "display": "Patient"},
                         "what": dict(f.patient)})
    if f.details:
        entities.append({"type": {"system": _ENTITY_TYPE, "code": "2", "display": "System Object"},
                         "description": "delivery",
                         "detail": [{"type": k, "valueString": v} for k, v in sorted(f.details.items())]})
    event: dict[str, Any] = {
        "resourceType": "AuditEvent",
        "meta": {"profile": [f"{BALP}/IHE.BasicAudit.PrivacyDisclosure.Source"]},
        "type": {"system": _DCM, "code": "110106", "display": "Export"},
        "subtype": [{"system": "http://terminology.hl7.org/CodeSystem/iso-21089-lifecycle", "code": "disclose"}],
        "action": "R",
        "recorded": fhir_instant(f.recorded),
        "outcome": f.outcome,
        "agent": [
            {"type": {"coding": [{"system": _DCM, "code": "110153", "display": "Source Role ID"}]},
             "who": {"reference": "Device/lytestream"}, "requestor": False,
             "network": {"address": base_url, "type": "5"}},
            recipient,
        ],
        "source": _SOURCE,
        "entity": entities,
    }
    if f.outcome_desc:
        event["outcomeDesc"] = f.outcome_desc
    return event
