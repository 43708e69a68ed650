"""Validated FHIR resource dicts → plain incoming records, with the checks the models do not make.

fhir.resources does not enforce code values or invariants, and lytestream needs more than FHIR
requires (an identifier to make resends idempotent, a patient, a time of day). Each check here
yields an Issue with the FHIRPath of the element; nothing here touches the database.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

import orjson

from service.domain.catalogue import LOINC_SYSTEM, CatalogueEntry
from service.domain.insulin import InsulinCodes
from service.domain.units import UCUM_SYSTEM, UnitNotAccepted, to_canonical
from service.domain.values import ResultStatus
from service.errors import Issue
from service.fhir.datetimes import without_leap_second

__all__ = [
    "IncomingInsulin",
    "IncomingObservation",
    "IncomingPatient",
    "Invalid",
    "content_hash",
    "normalise_insulin",
    "normalise_observation",
    "normalise_patient",
    "parse_datetime",
]

REPLACES_URL = "http://hl7.org/fhir/StructureDefinition/observation-replaces"
OBSERVATION_STATUSES = frozenset(s.value for s in ResultStatus)
MEDADMIN_STATUSES = frozenset(
    {"in-progress", "not-done", "on-hold", "completed", "entered-in-error", "stopped", "unknown"}
)
# Route codings that say where insulin went. SNOMED CT (from memory; verify locally): 47625008
# "Intravenous route", 34206005 "Subcutaneous route". HL7 v2 table 0162 (Route of administration):
# IV intravenous, SC subcutaneous, the codes interface engines carry over from v2 RXR-1.
SNOMED_SYSTEM = "http://snomed.info/sct"
V2_ROUTE_SYSTEM = "http://terminology.hl7.org/CodeSystem/v2-0162"
_ROUTES = {
    (SNOMED_SYSTEM, "47625008"): "intravenous",
    (SNOMED_SYSTEM, "34206005"): "subcutaneous",
    (V2_ROUTE_SYSTEM, "IV"): "intravenous",
    (V2_ROUTE_SYSTEM, "SC"): "subcutaneous",
    (None, "IV"): "intravenous",  # the v2 code sent without a system, as some engines do
    (None, "SC"): "subcutaneous",
}
# HL7 v2 table 0493 (Specimen condition), code HEM "Hemolyzed" (from memory; verify locally).
V2_SPECIMEN_CONDITION_SYSTEM = "http://terminology.hl7.org/CodeSystem/v2-0493"
_HAEMOLYSIS_WORDS = ("haemoly", "hemoly")


class Invalid(Exception):
    """The resource cannot be accepted; ``issues`` say why and where."""

    def __init__(self, issues: list[Issue]) -> None:
        super().__init__("; ".join(i.message for i in issues))
        self.issues = issues


@dataclass(frozen=True, slots=True)
class IncomingObservation:
    identifier: tuple[str, str]
    subject: dict[str, Any]
    entry: CatalogueEntry
    status: str
    effective: datetime
    issued: datetime | None
    value: float | None
    comparator: str | None
    encounter: str | None
    replaces: str | None
    resource: dict[str, Any]
    content_hash: str
    quality: str | None = None  # a sample-quality remark that makes the result suspect
    sent_value: float | None = None  # the value as sent, in ``sent_unit``
    sent_unit: str | None = None  # the unit as sent: its text, else its UCUM code


@dataclass(frozen=True, slots=True)
class IncomingInsulin:
    identifier: tuple[str, str]
    subject: dict[str, Any]
    status: str
    medication: str
    route: str | None
    start: datetime
    end: datetime | None
    resource: dict[str, Any]
    content_hash: str


@dataclass(frozen=True, slots=True)
class IncomingPatient:
    """A Patient sent only so that its references and identifiers name one person."""

    id: str | None
    identifiers: tuple[tuple[str, str], ...]
    resource: dict[str, Any]


def content_hash(resource: dict[str, Any]) -> str:
    """Hash of what the sender said, without the server-managed id and meta."""
    body = {k: v for k, v in resource.items() if k not in ("id", "meta")}
    return hashlib.sha256(orjson.dumps(body, option=orjson.OPT_SORT_KEYS)).hexdigest()


# Times lytestream can compute with: windows and look-backs of years either side stay within datetime's
# range (years 1 to 9999). FHIR allows years 0001 and 9999 with any offset, which may not even have a UTC
# reading (0001-01-01T00:00:00+14:00 is in year 0); no lab result is dated there.
EARLIEST = datetime(1900, 1, 1, tzinfo=UTC)
LATEST = datetime(9000, 1, 1, tzinfo=UTC)


def parse_datetime(value: str) -> datetime:
    """A FHIR dateTime/instant with offset → aware UTC. Partial dates are the caller's to refuse.

    ValueError when the text is not a date-time or its instant is outside EARLIEST..LATEST.
    """
    try:
        when = datetime.fromisoformat(without_leap_second(value).replace("Z", "+00:00")).astimezone(UTC)
    except OverflowError as exc:
        raise ValueError(f"{value!r} has no UTC reading within years 1 to 9999") from exc
    if not EARLIEST <= when < LATEST:
        raise ValueError(f"{value!r} is outside the times lytestream reads ({EARLIEST.year} to {LATEST.year})")
    return when


def _read_time(value: Any, path: str, issues: list[Issue]) -> datetime | None:
    """``value`` read as a date-time with a time of day, or None; an unreadable one is an Issue at ``path``."""
    if not _has_time(value):
        return None
    try:
        return parse_datetime(value)
    except ValueError as exc:
        issues.append(Issue("value", str(exc), (path,), status=422))
        return None


def _has_time(value: Any) -> bool:
    return isinstance(value, str) and "T" in value


def _identifier(resource: dict[str, Any], root: str, what: str) -> tuple[str, str]:
    for ident in resource.get("identifier") or ():
        system, value = ident.get("system"), ident.get("value")
        if system and value:
            return str(system), str(value)
    raise Invalid(
        [
            Issue(
                "required",
                f"{what} needs an identifier with system and value: lytestream keys resends, "
                "corrections and withdrawals on it",
                (f"{root}.identifier",),
                status=422,
            )
        ]
    )


def _subject(resource: dict[str, Any], root: str) -> dict[str, Any]:
    subject = resource.get("subject")
    if not subject or not (subject.get("reference") or subject.get("identifier")):
        raise Invalid(
            [Issue("required", "subject is required: the Patient this is about", (f"{root}.subject",), status=422)]
        )
    return dict(subject)


def normalise_observation(resource: dict[str, Any], entry: CatalogueEntry, root: str) -> IncomingObservation:
    """A validated Observation dict of a watched LOINC code → IncomingObservation, or Invalid."""
    issues: list[Issue] = []
    status = resource.get("status")
    if status not in OBSERVATION_STATUSES:
        issues.append(
            Issue(
                "code-invalid",
                f"unknown Observation.status {status!r}; expected one of {', '.join(sorted(OBSERVATION_STATUSES))}",
                (f"{root}.status",),
            )
        )
    try:
        identifier = _identifier(resource, root, "Observation")
    except Invalid as exc:
        issues += exc.issues
        identifier = ("", "")
    try:
        subject = _subject(resource, root)
    except Invalid as exc:
        issues += exc.issues
        subject = {}

    unreadable = len(issues)
    effective, effective_path = _observation_time(resource, root, issues)
    if effective is None and len(issues) == unreadable:
        issues.append(
            Issue(
                "required",
                "effective[x] with a time of day is required: rules order results by collection time",
                (effective_path,),
                status=422,
            )
        )
    value, comparator = None, None
    sent_value, sent_unit = None, None
    quantity = resource.get("valueQuantity")
    if quantity is not None and quantity.get("value") is not None:
        value, comparator, unit_issue = _quantity(quantity, entry, f"{root}.valueQuantity")
        if unit_issue:
            issues.append(unit_issue)
        elif value is not None:
            shown = quantity.get("unit") or quantity.get("code")
            sent_value, sent_unit = float(quantity["value"]), (str(shown) if shown else None)
    issued = _read_time(resource.get("issued"), f"{root}.issued", issues)
    if issues:
        raise Invalid(issues)
    assert effective is not None
    return IncomingObservation(
        identifier=identifier,
        subject=subject,
        entry=entry,
        status=str(status),
        effective=effective,
        issued=issued,
        value=value,
        comparator=comparator,
        encounter=(resource.get("encounter") or {}).get("reference"),
        replaces=_replaces(resource),
        resource=resource,
        content_hash=content_hash(resource),
        quality=sample_quality(resource),
        sent_value=sent_value,
        sent_unit=sent_unit,
    )


def sample_quality(resource: dict[str, Any]) -> str | None:
    """What the lab said that makes the sample suspect, in a few words, or None.

    Looks where labs put it: a contained Specimen's condition (HL7 v2 table 0493 HEM, or words), an
    interpretation or note that says the sample was haemolysed, or a component reporting a
    haemolysis index above zero.
    """
    contained = {f"#{c.get('id')}": c for c in resource.get("contained") or () if isinstance(c, dict)}
    specimen = contained.get(str((resource.get("specimen") or {}).get("reference")))
    for condition in (specimen or {}).get("condition") or ():
        for coding in condition.get("coding") or ():
            if coding.get("system") == V2_SPECIMEN_CONDITION_SYSTEM and coding.get("code") == "HEM":
                return "haemolysed (specimen condition HEM)"
        if _mentions_haemolysis(condition.get("text")):
            return "haemolysed (specimen condition)"
    for concept in resource.get("interpretation") or ():
        texts = [concept.get("text"), *(c.get("display") for c in concept.get("coding") or ())]
        if any(_mentions_haemolysis(t) for t in texts):
            return "haemolysed (interpretation)"
    for note in resource.get("note") or ():
        if _mentions_haemolysis(note.get("text")):
            return "haemolysed (note)"
    for component in resource.get("component") or ():
        code = component.get("code") or {}
        texts = [code.get("text"), *(c.get("display") for c in code.get("coding") or ())]
        value = (component.get("valueQuantity") or {}).get("value")
        if any(_mentions_haemolysis(t) for t in texts) and isinstance(value, int | float) and value > 0:
            return f"haemolysis index {value:g}"
    return None


def _mentions_haemolysis(text: Any) -> bool:
    return isinstance(text, str) and any(word in text.lower() for word in _HAEMOLYSIS_WORDS)


def _observation_time(resource: dict[str, Any], root: str, issues: list[Issue]) -> tuple[datetime | None, str]:
    """The collection time and the element it was read from (FHIRPath ``effective`` when there is none)."""
    for key in ("effectiveDateTime", "effectiveInstant"):
        if key in resource:
            return _read_time(resource[key], f"{root}.{key}", issues), f"{root}.{key}"
    period = resource.get("effectivePeriod")
    if period is not None:
        # Collection time is the start of the period; an end alone is the best we have.
        for key in ("start", "end"):
            if _has_time(period.get(key)):
                path = f"{root}.effectivePeriod.{key}"
                return _read_time(period[key], path, issues), path
        # Neither has a time of day: name the one sent (start first), or the Period if it is empty.
        sent = next((k for k in ("start", "end") if k in period), None)
        return None, f"{root}.effectivePeriod.{sent}" if sent else f"{root}.effectivePeriod"
    return None, f"{root}.effective"


def _quantity(
    quantity: dict[str, Any], entry: CatalogueEntry, path: str
) -> tuple[float | None, str | None, Issue | None]:
    system, code, text = quantity.get("system"), quantity.get("code"), quantity.get("unit")
    if code is not None and system != UCUM_SYSTEM:
        return (
            None,
            None,
            Issue(
                "value",
                f"unit code {code!r} must come with system {UCUM_SYSTEM} (UCUM)",
                (f"{path}.system",),
                status=422,
            ),
        )
    try:
        value = to_canonical(entry, float(quantity["value"]), code=code, text=text)
    except UnitNotAccepted as exc:
        return (
            None,
            None,
            Issue(
                "value",
                f"unit {exc.unit!r} is not accepted for LOINC {entry.code} ({entry.display}); "
                f"send a UCUM unit of the term's property, e.g. {', '.join(exc.accepted)}",
                (f"{path}.code" if code is not None else f"{path}.unit",),
                status=422,
            ),
        )
    return value, quantity.get("comparator"), None


def _replaces(resource: dict[str, Any]) -> str | None:
    for ext in resource.get("extension") or ():
        if ext.get("url") == REPLACES_URL:
            ref = ext.get("valueReference") or {}
            if ref.get("reference"):
                return str(ref["reference"]).split("/_history/")[0]
            ident = ref.get("identifier") or {}
            if ident.get("system") and ident.get("value"):
                return f"id:{ident['system']}|{ident['value']}"
    return None


def normalise_insulin(
    resource: dict[str, Any], codes: InsulinCodes, root: str
) -> IncomingInsulin | None:
    """A validated MedicationAdministration → IncomingInsulin; None when it is not insulin."""
    concept = resource.get("medicationCodeableConcept") or {}
    medication = codes.match(concept.get("coding") or ())
    if medication is None:
        return None
    issues: list[Issue] = []
    status = resource.get("status")
    if status not in MEDADMIN_STATUSES:
        issues.append(
            Issue(
                "code-invalid",
                f"unknown MedicationAdministration.status {status!r}; "
                f"expected one of {', '.join(sorted(MEDADMIN_STATUSES))}",
                (f"{root}.status",),
            )
        )
    try:
        identifier = _identifier(resource, root, "MedicationAdministration")
    except Invalid as exc:
        issues += exc.issues
        identifier = ("", "")
    subject = resource.get("subject") or {}
    start: datetime | None = None
    end: datetime | None = None
    unreadable = len(issues)
    if "effectiveDateTime" in resource:
        where = f"{root}.effectiveDateTime"
        start = end = _read_time(resource["effectiveDateTime"], where, issues)
    elif isinstance(resource.get("effectivePeriod"), dict):
        period = resource["effectivePeriod"]
        where = f"{root}.effectivePeriod.start" if "start" in period else f"{root}.effectivePeriod"
        start = _read_time(period.get("start"), f"{root}.effectivePeriod.start", issues)
        end = _read_time(period.get("end"), f"{root}.effectivePeriod.end", issues)
    else:
        where = f"{root}.effective"
    if start is None and len(issues) == unreadable:
        issues.append(
            Issue(
                "required",
                "effectiveDateTime or effectivePeriod.start with a time of day is required",
                (where,),
                status=422,
            )
        )
    if issues:
        raise Invalid(issues)
    assert start is not None
    return IncomingInsulin(
        identifier=identifier,
        subject=dict(subject),
        status=str(status),
        medication=medication,
        route=_route(resource.get("dosage") or {}),
        start=start,
        end=end,
        resource=resource,
        content_hash=content_hash(resource),
    )


def _route(dosage: dict[str, Any]) -> str | None:
    """The route as a word: a coded route first; then a rate, which makes it an infusion whatever
    the route text says (MedicationAdministration.dosage.rate[x]); then the route text."""
    route = dosage.get("route") or {}
    for coding in route.get("coding") or ():
        found = _ROUTES.get((coding.get("system"), coding.get("code")))
        if found is not None:
            return found
    if dosage.get("rateQuantity") or dosage.get("rateRatio"):
        return "intravenous"
    text = str(route.get("text") or "").lower()
    if "intraven" in text or text == "iv":
        return "intravenous"
    if "subcut" in text or text in ("sc", "sq"):
        return "subcutaneous"
    return text or None


def normalise_patient(resource: dict[str, Any], root: str) -> IncomingPatient:
    """The names a Patient gives itself. Also read before validation (to resolve a Bundle's urn:uuid
    references), so whatever is not shaped as FHIR says is left out here and refused by validation."""
    found = resource.get("identifier")
    identifiers = tuple(
        (i["system"], i["value"])
        for i in (found if isinstance(found, list) else ())
        if isinstance(i, dict) and isinstance(i.get("system"), str) and isinstance(i.get("value"), str)
        and i["system"] and i["value"]
    )
    rid = resource.get("id")
    return IncomingPatient(id=rid if isinstance(rid, str) else None, identifiers=identifiers, resource=resource)


def loinc_codes(resource: dict[str, Any]) -> list[str]:
    """The LOINC codes in Observation.code, in order."""
    return [
        str(c.get("code"))
        for c in (resource.get("code") or {}).get("coding") or ()
        if isinstance(c, dict) and c.get("system") == LOINC_SYSTEM
    ]
