"""A stored flag version → FHIR R4 Flag JSON. Pure.

The Flag carries its evidence (one version-specific ``flag-detail`` per result), its priority
(``flag-priority``), and an extension of ours with the rule, the episode, the computed numbers and the
hash of the policy it was judged under, so an analyst can explain it later from the Flag alone. While an
acknowledgement covers it (made at or after the priority it saw began), a second extension of ours,
``flag-acknowledgement``, says who acknowledged it (``by``: the named person, else the token's client),
through which ``client``, ``when``, the ``note`` and the ``acknowledgedVersion``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from service.domain.findings import Rule
from service.fhir.render import CAUTION, fhir_instant
from service.vocabulary import priority_code, priority_display

__all__ = [
    "ACKNOWLEDGEMENT_URL",
    "AckView",
    "EVALUATION_URL",
    "FlagView",
    "RULE_SYSTEM",
    "SUBJECT_ALIAS_URL",
    "render_flag",
    "subject_reference",
]

# Our own namespace (".example" is reserved, so it can never collide with a real site).
CANONICAL_BASE = "https://lytestream.example/fhir"
RULE_SYSTEM = f"{CANONICAL_BASE}/CodeSystem/rule"
EVALUATION_URL = f"{CANONICAL_BASE}/StructureDefinition/flag-evaluation"
ACKNOWLEDGEMENT_URL = f"{CANONICAL_BASE}/StructureDefinition/flag-acknowledgement"
# On Flag.subject: one more name the feed used for the patient (valueReference or valueIdentifier), beyond
# the subject's own reference and identifier.
SUBJECT_ALIAS_URL = f"{CANONICAL_BASE}/StructureDefinition/subject-alias"
FLAG_PRIORITY_URL = "http://hl7.org/fhir/StructureDefinition/flag-priority"
FLAG_DETAIL_URL = "http://hl7.org/fhir/StructureDefinition/flag-detail"


@dataclass(frozen=True, slots=True)
class AckView:
    """The acknowledgement a Flag version shows."""

    by: str  # the named person, else the client
    client: str
    when: datetime
    note: str | None
    version: int  # the Flag version that was acknowledged


@dataclass(frozen=True, slots=True)
class FlagView:
    """Everything one Flag version shows."""

    id: str
    version_id: int
    last_updated: datetime
    status: str
    rule: str
    episode: str
    priority: str
    period_start: datetime
    period_end: datetime | None
    evidence: Sequence[str]
    numbers: Mapping[str, float]
    sentence: str
    subject: Mapping[str, Any]
    encounter: str | None
    policy_hash: str
    acknowledgement: AckView | None = None
    lead: str = ""  # what this version did, before the sentence ("Acknowledged by …: "); "" for none


def subject_reference(aliases: Sequence[str]) -> dict[str, Any]:
    """A patient's aliases (``ref:<reference>``, ``id:<system>|<value>``, in a stable order) as one R4
    Reference: the first literal reference, the first identifier, and the rest as ``subject-alias``."""
    refs = [a.removeprefix("ref:") for a in aliases if a.startswith("ref:")]
    ids = [_identifier(a.removeprefix("id:")) for a in aliases if a.startswith("id:")]
    subject: dict[str, Any] = {}
    if refs:
        subject["reference"] = refs[0]
    if ids:
        subject["identifier"] = ids[0]
    rest = [{"url": SUBJECT_ALIAS_URL, "valueReference": {"reference": r}} for r in refs[1:]]
    rest += [{"url": SUBJECT_ALIAS_URL, "valueIdentifier": i} for i in ids[1:]]
    if rest:
        subject["extension"] = rest
    return subject


def _identifier(alias: str) -> dict[str, str]:
    system, _, value = alias.rpartition("|")
    return {"system": system, "value": value} if system else {"value": value}


def render_flag(v: FlagView) -> dict[str, Any]:
    code, display = priority_code(v.priority), priority_display(v.priority)
    evaluation: list[dict[str, Any]] = [
        {"url": "rule", "valueCode": v.rule},
        {"url": "episode", "valueString": v.episode},
        {"url": "policyHash", "valueString": v.policy_hash},
        *(
            {"url": "number", "extension": [{"url": "name", "valueString": name},
                                           {"url": "value", "valueDecimal": value}]}
            for name, value in v.numbers.items()
        ),
        {"url": "caution", "valueString": CAUTION},
    ]
    flag: dict[str, Any] = {
        "resourceType": "Flag",
        "id": v.id,
        "meta": {"versionId": str(v.version_id), "lastUpdated": fhir_instant(v.last_updated)},
        "extension": [
            {"url": FLAG_PRIORITY_URL, "valueCodeableConcept": {"coding": [
                {"system": "http://hl7.org/fhir/flag-priority-code", "code": code, "display": display}]}},
            *({"url": FLAG_DETAIL_URL, "valueReference": {"reference": ref}} for ref in v.evidence),
            {"url": EVALUATION_URL, "extension": evaluation},
            *([_acknowledgement(v.acknowledgement)] if v.acknowledgement else []),
        ],
        "status": v.status,
        "category": [{"coding": [{"system": "http://terminology.hl7.org/CodeSystem/flag-category",
                                  "code": "clinical", "display": "Clinical"}]}],
        "code": {"coding": [_rule_coding(v.rule)], "text": v.lead + v.sentence},
        "subject": dict(v.subject),
        "period": {"start": fhir_instant(v.period_start)},
        "author": {"reference": "Device/lytestream", "display": "lytestream"},
    }
    if v.period_end is not None:
        flag["period"]["end"] = fhir_instant(v.period_end)
    if v.encounter:
        flag["encounter"] = {"reference": v.encounter}
    return flag


def _rule_coding(rule: str) -> dict[str, Any]:
    coding = {"system": RULE_SYSTEM, "code": rule}
    try:
        coding["display"] = Rule(rule).display
    except ValueError:  # a rule code this build no longer knows: its code alone
        pass
    return coding


def _acknowledgement(a: AckView) -> dict[str, Any]:
    parts: list[dict[str, Any]] = [
        {"url": "by", "valueString": a.by},
        {"url": "client", "valueString": a.client},
        {"url": "when", "valueDateTime": fhir_instant(a.when)},
    ]
    if a.note:
        parts.append({"url": "note", "valueString": a.note})
    parts.append({"url": "acknowledgedVersion", "valuePositiveInt": a.version})
    return {"url": ACKNOWLEDGEMENT_URL, "extension": parts}
