"""The conformance resources behind the canonicals the CapabilityStatement cites. Pure.

Each is served at its FHIR read path under this server's base (``SearchParameter/Flag-detail`` for
``https://lytestream.example/fhir/SearchParameter/Flag-detail``), built from the same definitions the service
runs on (the rule codes, the topics), so what is declared cannot drift from what is done.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from service import __version__
from service.domain.findings import Rule
from service.fhir.flag_render import CANONICAL_BASE, FLAG_DETAIL_URL, FLAG_PRIORITY_URL, RULE_SYSTEM
from service.fhir.render import CAUTION
from service.notify.topics import TOPICS

__all__ = ["CONFORMANCE_TYPES", "canonical", "conformance_resource"]

CONFORMANCE_TYPES = ("SearchParameter", "OperationDefinition", "CodeSystem", "SubscriptionTopic",
                     "StructureDefinition")
_COMMON = {"status": "active", "experimental": False, "publisher": "lytestream", "version": __version__}


def canonical(rtype: str, rid: str) -> str:
    return f"{CANONICAL_BASE}/{rtype}/{rid}"


def _search_parameter(code: str, kind: str, expression: str | None, description: str,
                      **extra: Any) -> dict[str, Any]:
    """``expression`` None: the value is kept beside the Flag (the acknowledgements), not in its elements."""
    rid = f"Flag-{code}"
    where = {"expression": expression} if expression else {}
    return {"resourceType": "SearchParameter", "id": rid, "url": canonical("SearchParameter", rid),
            "name": "Flag" + "".join(part.capitalize() for part in code.split("-")), **_COMMON,
            "description": description, "code": code, "base": ["Flag"], "type": kind, **where, **extra}


def _param(name: str, use: str, kind: str | None, doc: str, min_: int = 0, max_: str = "1",
           parts: list[dict[str, Any]] | None = None) -> dict[str, Any]:
    p: dict[str, Any] = {"name": name, "use": use, "min": min_, "max": max_, "documentation": doc}
    if kind:
        p["type"] = kind
    if parts:
        p["part"] = parts
    return p


def _out(name: str, kind: str | None, doc: str, parts: list[dict[str, Any]] | None = None) -> dict[str, Any]:
    return _param(name, "out", kind, doc, parts=parts)


def _latency(name: str, doc: str, *extra: dict[str, Any]) -> dict[str, Any]:
    return _out(name, None, doc, [
        _out("count", "integer", "Flags measured"),
        _out("median_seconds", "decimal", "nearest-rank median; absent when none was measured"),
        _out("p90_seconds", "decimal", "nearest-rank 90th percentile; absent when none was measured"),
        _out("median_minutes", "decimal", "the median in minutes, 2 decimals"),
        _out("p90_minutes", "decimal", "the 90th percentile in minutes, 2 decimals"), *extra])


def _by(name: str, doc: str) -> dict[str, Any]:
    return _out(name, None, doc + "; one part per key (named by it, valueInteger), absent when none",
                [_param("(key)", "out", "integer", "the count for that key", max_="*")])


def _operation_definitions() -> list[dict[str, Any]]:
    ack = {"resourceType": "OperationDefinition", "id": "Flag-acknowledge",
           "url": canonical("OperationDefinition", "Flag-acknowledge"), "name": "FlagAcknowledge", **_COMMON,
           "kind": "operation", "affectsState": True, "code": "acknowledge", "resource": ["Flag"],
           "system": False, "type": False, "instance": True,
           "description": "Record that the team has seen this active Flag: its escalation stops for the priority "
                          "it had when acknowledged, and a new Flag version shows the acknowledgement (extension "
                          "flag-acknowledgement). Acknowledging the version an acknowledgement wrote changes "
                          "nothing and says who acknowledged it and when (already = true). " + CAUTION,
           "parameter": [
               _param("note", "in", "string", "free text kept with the acknowledgement (at most 2000 characters)"),
               _param("who", "in", "string", "the person acknowledging, when not the token's client (at most 200 "
                                             "characters); a valueReference with a display is read as that "
                                             "display"),
               _param("flag", "out", "Reference", "the Flag version that shows the acknowledgement", 1),
               _param("acknowledged", "out", "dateTime", "when", 1),
               _param("by", "out", "string", "the person named by who, else the client the token names", 1),
               _param("client", "out", "string", "the client the token names", 1),
               _param("note", "out", "string", "the note kept"),
               _param("already", "out", "boolean", "true when this version was already acknowledged: nothing "
                                                   "was written, and by and acknowledged are the earlier "
                                                   "acknowledgement's", 1),
               _param("message", "out", "string", "what happened, in words", 1),
           ]}
    summary = {"resourceType": "OperationDefinition", "id": "Flag-summary",
               "url": canonical("OperationDefinition", "Flag-summary"), "name": "FlagSummary", **_COMMON,
               "kind": "operation", "affectsState": False, "code": "summary", "resource": ["Flag"],
               "system": False, "type": True, "instance": False,
               "description": "The informatics summary of the Flags first raised in [start, end): counts, alert "
                              "burden, latencies, escalations, notifications; counts and times only, no patient "
                              "data. " + CAUTION,
               "parameter": [
                   _param("start", "in", "string", "YYYY-MM-DD (midnight UTC) or a date-time with an offset; "
                                                   "included", 1),
                   _param("end", "in", "string", "the same forms; excluded; at most 366 days after start", 1),
                   _out("start", "instant", "the range's start"),
                   _out("end", "instant", "the range's end"),
                   _out("range", "string", "how the range is read"),
                   _out("flags_raised", "integer", "Flags whose first version was written in the range"),
                   _by("flags_by_rule", "those Flags by rule code"),
                   _by("flags_by_priority", "those Flags by the priority they were raised with: PH (High "
                       "priority), PM (Medium priority), PL (Low priority)"),
                   _out("alert_burden", None, "Flags per result and per patient-day", [
                       _out("results_stored", "integer", "results first stored in the range"),
                       _out("patient_days", "integer", "distinct (patient, UTC date) with a result"),
                       _out("flags_per_1000_results", "decimal", "absent without results"),
                       _out("flags_per_patient_day", "decimal", "absent without patient-days")]),
                   _out("results_not_evaluated", None, "results no rule can read as they now stand", [
                       _out("count", "integer", "how many"),
                       _by("by_reason", "by reason")]),
                   _out("results_dropped_under_suspect_codes", None,
                        "results not stored because their code looked like a mistyped watched code", [
                            _out("count", "integer", "how many"),
                            _by("by_client", "by the client that sent them")]),
                   _latency("result_to_flag", "from the evidence time to the Flag"),
                   _latency("flag_to_acknowledgement", "from the Flag to its acknowledgement",
                            _out("unacknowledged", "integer", "Flags never acknowledged")),
                   _out("escalations", None, "escalation rounds", [
                       _out("count", "integer", "escalation events"),
                       _out("flags_escalated", "integer", "distinct Flags escalated")]),
                   _out("notifications", None, "notifications queued for subscribers in the range", [
                       _out(n, "integer", d) for n, d in (
                           ("count", "notifications queued"), ("delivered", "notifications delivered"),
                           ("retried", "delivered or given up after a failed try"),
                           ("failed", "notifications given up"), ("pending", "notifications not yet sent"),
                           ("attempts", "delivery tries in all"))]),
                   _by("audit_events_by_subtype", "AuditEvents recorded in the range by subtype"),
                   _out("definitions", None, "what each figure counts; one valueString part per term",
                        [_param("(term)", "out", "string", "its definition", max_="*")]),
                   _out("caution", "string", "decision support only"),
               ]}
    backtest = {"resourceType": "OperationDefinition", "id": "backtest",
                "url": canonical("OperationDefinition", "backtest"), "name": "Backtest", **_COMMON,
                "kind": "operation", "affectsState": False, "code": "backtest", "system": True, "type": False,
                "instance": False,
                "description": "Re-evaluate the stored history of [start, end) under a candidate policy and the "
                               "baseline with the live rules on a simulated clock, and compare them. "
                               "Asynchronous: 202 with Content-Location naming a status URL "
                               "([base]/$backtest-status/[id]) that answers 202 while it runs and 200 with the "
                               "figures when done; counts and times only. " + CAUTION,
                "parameter": [
                    _param("start", "in", "string", "range start, included: YYYY-MM-DD or an instant with offset", 1),
                    _param("end", "in", "string", "range end, excluded", 1),
                    _param("policy", "in", "string", "the candidate policy, TOML text (as policy check reads it)", 1),
                    _param("baseline", "in", "string", "the baseline policy, TOML text; default the policy in force"),
                    _param("return", "out", "Parameters", "when done: per policy Flags raised, patients affected, "
                           "burden, result → Flag median and p90 (nearest rank), escalations if never "
                           "acknowledged, Flags by rule and raised priority; Flags gained and lost by rule", 1),
                ]}
    return [ack, summary, backtest]


def _search_parameters() -> list[dict[str, Any]]:
    return [
        _search_parameter("status", "token", "Flag.status",
                          "The Flag's status (http://hl7.org/fhir/flag-status): active | inactive | "
                          "entered-in-error."),
        _search_parameter("code", "token", "Flag.code",
                          f"The rule that raised the Flag ({RULE_SYSTEM})."),
        _search_parameter("priority", "token", f"Flag.extension('{FLAG_PRIORITY_URL}').value",
                          "The Flag's priority (http://hl7.org/fhir/flag-priority-code): PH | PM | PL."),
        _search_parameter("detail", "reference", f"Flag.extension('{FLAG_DETAIL_URL}').value",
                          "The result versions a Flag rests on (the R4 flag-detail extension): "
                          "_include=Flag:detail returns them; detail=Observation/[id] finds the Flags citing any "
                          "version of that result.",
                          target=["Observation", "MedicationAdministration"]),
        _search_parameter("acknowledged", "token", None,
                          "Whether an acknowledgement ($acknowledge) is recorded for the Flag: true | false. "
                          "acknowledged=false finds the Flags nobody acknowledged."),
        _search_parameter("acknowledged-after", "number", None,
                          "Minutes from the Flag's raising to its first acknowledgement, with the number "
                          "prefixes eq, gt, ge, lt, le (repeats are ANDed): acknowledged-after=gt30 finds the "
                          "Flags first acknowledged more than 30 minutes after they were raised. A Flag never "
                          "acknowledged matches no value.", comparator=["eq", "gt", "ge", "lt", "le"]),
    ]


def _rule_code_system() -> dict[str, Any]:
    return {"resourceType": "CodeSystem", "id": "rule", "url": RULE_SYSTEM, "name": "LytestreamRule", **_COMMON,
            "description": "The rules whose findings lytestream raises as Flags. " + CAUTION,
            "caseSensitive": True, "content": "complete",
            "concept": [{"code": r.value, "display": r.display} for r in Rule]}


_FILTER_WORDS = {
    "patient:identifier": "Flag search parameter patient with the :identifier modifier: system|value of any "
                          "identifier the Flag names its patient by (subject.identifier or a subject-alias "
                          "extension)",
}


def _topics() -> list[dict[str, Any]]:
    out = []
    for topic in TOPICS.values():
        rid = topic.url.rsplit("/", 1)[1]
        out.append({
            "resourceType": "SubscriptionTopic", "id": rid, "url": topic.url, "title": topic.title,
            **{k: v for k, v in _COMMON.items() if k != "publisher"}, "publisher": "lytestream",
            "description": topic.description,
            "resourceTrigger": [{"description": topic.description,
                                 "resource": "http://hl7.org/fhir/StructureDefinition/Flag",
                                 "supportedInteraction": ["create", "update"]}],
            "canFilterBy": [{"resource": "Flag", "filterParameter": f, "description": _FILTER_WORDS.get(
                f, f"Flag search parameter {f}")} for f in sorted(topic.filters)],
            "notificationShape": [{"resource": "Flag"}],
        })
    return out


def _all() -> Mapping[tuple[str, str], dict[str, Any]]:
    resources = [*_search_parameters(), *_operation_definitions(), _rule_code_system(), *_topics()]
    return {(r["resourceType"], r["id"]): r for r in resources}


_RESOURCES = _all()


def conformance_resource(rtype: str, rid: str) -> dict[str, Any] | None:
    return _RESOURCES.get((rtype, rid))
