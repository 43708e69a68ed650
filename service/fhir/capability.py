"""The CapabilityStatement: what this server really does, and nothing it does not."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from service import __version__
from service.fhir.flag_render import CANONICAL_BASE, RULE_SYSTEM
from service.fhir.render import CAUTION, fhir_instant
from service.notify.topics import TOPICS

__all__ = ["capability_statement"]


def _search(name: str, kind: str, doc: str, ours: bool = False) -> dict[str, str]:
    param = {"name": name, "type": kind, "documentation": doc}
    if ours:
        # Not a Flag search parameter in R4: defined by this server.
        param["definition"] = f"{CANONICAL_BASE}/SearchParameter/Flag-{name}"
    return param


# Every search takes these (search.html#count, #summary, #total); other parameters are ignored with a warning
# in the searchset's OperationOutcome unless the client sends Prefer: handling=strict (search.html#errors).
_CONTROL = (
    {"name": "_count", "type": "number", "documentation": "page size; 0 answers the total only"},
    {"name": "_summary", "type": "token", "documentation": "count: the total only"},
    {"name": "_total", "type": "token", "documentation": "none leaves the total out; estimate and accurate count"},
)


def capability_statement(*, base_url: str, now: datetime, lab_timezone: str | None,
                         oauth_uris: dict[str, Any] | None = None) -> dict[str, Any]:
    ingest = {
        "versioning": "versioned",
        "readHistory": True,
        "updateCreate": False,
        "conditionalCreate": True,
        "conditionalUpdate": True,
        "conditionalDelete": "not-supported",
    }
    zone = (f" Date-times without an offset are read in {lab_timezone}." if lab_timezone
            else " Date-times without a UTC offset are refused.")
    return {
        "resourceType": "CapabilityStatement",
        "status": "active",
        "date": fhir_instant(now),
        "publisher": "lytestream",
        "kind": "instance",
        "software": {"name": "lytestream", "version": __version__},
        "implementation": {"description": "lytestream lab-result safety service. " + CAUTION, "url": base_url},
        "fhirVersion": "4.0.1",
        "format": ["application/fhir+json", "json"],
        "rest": [
            {
                "mode": "server",
                "documentation": (
                    "Searches are lenient: an unsupported parameter is ignored and named in a warning of the "
                    "searchset's OperationOutcome; Prefer: handling=strict makes it a 400. "
                    "Observations of the watched LOINC codes (sodium, potassium, glucose, osmolality, urea) and "
                    "insulin MedicationAdministrations are stored; other resources in a Bundle are acknowledged "
                    "and not stored. Patient entries only link identifiers. Creates and updates are keyed on "
                    "the business identifier: a resend is idempotent." + zone
                ),
                "security": {
                    **({"extension": [oauth_uris]} if oauth_uris else {}),
                    "service": [{"coding": [{"system": "http://terminology.hl7.org/CodeSystem/restful-security-service",
                                             "code": "SMART-on-FHIR"}]}],
                    "description": "Bearer token on every interaction but metadata: SMART v2 system scopes "
                                   "(v1 .read/.write accepted); tokens minted by this server or JWT access "
                                   "tokens of the hospital's authorisation server. A create that would change "
                                   "a held resource needs the update scope; a full-resource subscription "
                                   "needs system/Flag.r; a subscription belongs to the client that made it "
                                   "(others need our scope lytestream/admin).",
                },
                "interaction": [{"code": "transaction"}, {"code": "batch"}],
                "operation": [{"name": "backtest", "definition": f"{CANONICAL_BASE}/OperationDefinition/backtest"}],
                "resource": [
                    {
                        "type": "Observation",
                        "interaction": [{"code": c} for c in ("read", "vread", "history-instance", "create",
                                                              "update", "search-type")],
                        **ingest,
                        "searchParam": [
                            _search("patient", "reference", "Patient/id or identifier-based reference"),
                            _search("code", "token", "LOINC code: http://loinc.org|code or code (another "
                                    "system matches nothing)"),
                            _search("date", "date", "effective time; prefixes eq, ge, gt, le, lt"),
                            _search("identifier", "token", "the business identifier, system|value"),
                            _search("status", "token", "observation-status"),
                            _search("_id", "token", "the resource id"),
                            _search("_lastUpdated", "date", "when this version was written"),
                            *_CONTROL,
                        ],
                    },
                    {
                        "type": "Flag",
                        "documentation": "Raised by lytestream's rules; never written by clients. " + CAUTION,
                        "interaction": [{"code": c} for c in ("read", "vread", "history-instance", "search-type")],
                        "versioning": "versioned",
                        "readHistory": True,
                        "searchInclude": ["Flag:detail"],
                        "operation": [
                            {"name": "acknowledge",
                             "definition": f"{CANONICAL_BASE}/OperationDefinition/Flag-acknowledge"},
                            {"name": "summary", "definition": f"{CANONICAL_BASE}/OperationDefinition/Flag-summary"},
                        ],
                        "searchParam": [
                            _search("patient", "reference", "Patient/id, or patient:identifier=system|value"),
                            _search("date", "date", "the Flag's period overlaps the date"),
                            _search("_lastUpdated", "date", "when this Flag version was written"),
                            _search("status", "token", "active | inactive | entered-in-error", ours=True),
                            _search("code", "token", f"rule code ({RULE_SYSTEM})", ours=True),
                            _search("priority", "token", "PH | PM | PL (flag-priority)", ours=True),
                            _search("detail", "reference", "a result the Flag cites (Observation/id); "
                                    "_include=Flag:detail returns them", ours=True),
                            _search("encounter", "reference", "the Encounter (admission, ward stay) the results "
                                    "named, as sent: Encounter/id"),
                            _search("acknowledged", "token", "true: an acknowledgement is recorded; false: never "
                                    "acknowledged", ours=True),
                            _search("acknowledged-after", "number", "minutes from raising to the first "
                                    "acknowledgement, prefixes eq gt ge lt le (gt30: later than 30 min)",
                                    ours=True),
                            *_CONTROL,
                        ],
                    },
                    {
                        "type": "Subscription",
                        "documentation": "Topic-based (Subscriptions R5 Backport on R4): rest-hook, id-only by "
                                         "default, R4 Parameters or R4B SubscriptionStatus notifications. "
                                         + " ".join(f"Topic {t.url}: {t.description} Filters: "
                                                    f"{', '.join(sorted(t.filters))}." for t in TOPICS.values()),
                        "extension": [
                            {"url": "http://hl7.org/fhir/uv/subscriptions-backport/StructureDefinition/"
                                    "capabilitystatement-subscriptiontopic-canonical", "valueCanonical": topic}
                            for topic in TOPICS
                        ],
                        "interaction": [{"code": c} for c in ("create", "read", "update", "delete", "search-type")],
                        "operation": [
                            {"name": "status", "definition": "http://hl7.org/fhir/uv/subscriptions-backport/"
                                                             "OperationDefinition/backport-subscription-status"},
                            {"name": "events", "definition": "http://hl7.org/fhir/uv/subscriptions-backport/"
                                                             "OperationDefinition/backport-subscription-events"},
                        ],
                    },
                    {
                        "type": "AuditEvent",
                        "documentation": "Append-only, after IHE BALP: every ingest request, Flag access, "
                                         "acknowledgement and subscription change.",
                        "interaction": [{"code": "search-type"}],
                        "searchParam": [
                            _search("date", "date", "when it was recorded"),
                            _search("agent", "token", "the client the token names"),
                            _search("patient", "reference", "Patient/id, or patient:identifier=system|value"),
                            _search("subtype", "token", "interaction or operation code"),
                            _search("outcome", "token", "0 success, 4 minor failure (e.g. a notification the "
                                    "receiver did not accept), 8 serious failure"),
                        ],
                    },
                    {
                        "type": "MedicationAdministration",
                        "interaction": [{"code": c} for c in ("read", "vread", "history-instance", "create",
                                                              "update")],
                        **ingest,
                    },
                ],
            }
        ],
    }
