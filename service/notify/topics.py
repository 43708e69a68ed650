"""Our subscription topics, and an incoming backport Subscription → SubscriptionSpec. Pure.

Shapes follow the HL7 Subscriptions R5 Backport IG (profile ``backport-subscription``): the topic
canonical in ``Subscription.criteria``, filters in ``_criteria.extension`` (backport-filter-criteria,
several = AND), the content level in ``channel._payload.extension`` (backport-payload-content), and
heartbeat / timeout / max-count in ``channel.extension``. Whatever we cannot honour is refused with an
Issue whose FHIRPath points at the offending element, so a subscriber never believes it is filtered
or paged in a way it is not.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime
from typing import Any
from urllib.parse import unquote, urlsplit

from service.domain.findings import Rule
from service.errors import Issue
from service.fhir.flag_render import CANONICAL_BASE, FLAG_PRIORITY_URL, RULE_SYSTEM, SUBJECT_ALIAS_URL
from service.notify.headers import HeaderError, parse_header

__all__ = [
    "BACKPORT_SD",
    "CONTENT_CODES",
    "DEFAULT_CONTENT",
    "FLAG_ALERT",
    "FLAG_CHANGED",
    "FLAG_ESCALATED",
    "FORM_R4",
    "FORM_R4B",
    "Filter",
    "SubscriptionSpec",
    "TOPICS",
    "Topic",
    "matches",
    "parse_subscription",
]

BACKPORT_SD = "http://hl7.org/fhir/uv/subscriptions-backport/StructureDefinition"
FILTER_CRITERIA_URL = f"{BACKPORT_SD}/backport-filter-criteria"
PAYLOAD_CONTENT_URL = f"{BACKPORT_SD}/backport-payload-content"
HEARTBEAT_URL = f"{BACKPORT_SD}/backport-heartbeat-period"
TIMEOUT_URL = f"{BACKPORT_SD}/backport-timeout"
MAX_COUNT_URL = f"{BACKPORT_SD}/backport-max-count"
CHANNEL_TYPE_URL = f"{BACKPORT_SD}/backport-channel-type"

FLAG_CHANGED = f"{CANONICAL_BASE}/SubscriptionTopic/flag-changed"
FLAG_ESCALATED = f"{CANONICAL_BASE}/SubscriptionTopic/flag-escalated"
FLAG_ALERT = f"{CANONICAL_BASE}/SubscriptionTopic/flag-alert"

FORM_R4 = "r4"  # entry[0] is a Parameters (backport-subscription-status-r4)
FORM_R4B = "r4b"  # entry[0] is a SubscriptionStatus (backport-subscription-notification)
# Backport IG backport-content-code-system; id-only is the IG's balanced default and keeps PHI out of
# the notification unless the subscriber asks for it.
CONTENT_CODES = ("empty", "id-only", "full-resource")
DEFAULT_CONTENT = "id-only"
FHIR_JSON = "application/fhir+json"
# fhirVersion MIME parameter values (FHIR R4 http.html §3.1.0.1.7 "FHIR Version parameter").
_FORMS = {"4.0": FORM_R4, "4.0.1": FORM_R4, "4.3": FORM_R4B, "4.3.0": FORM_R4B}
_SUB_STATUS = ("requested", "active", "error", "off")  # R4 subscription-status
_PRIORITY_RANK = {"PL": 1, "PM": 2, "PH": 3}  # http://hl7.org/fhir/flag-priority-code
_FHIR_ID = re.compile(r"^[A-Za-z0-9\-.]{1,64}$")  # R4 datatypes.html#id


@dataclass(frozen=True, slots=True)
class Topic:
    """One topic we publish (advertised by canonical; R4 has no SubscriptionTopic resource)."""

    url: str
    title: str
    description: str
    filters: frozenset[str]


_FLAG_FILTERS = frozenset({"patient", "patient:identifier", "priority", "code"})
TOPICS: Mapping[str, Topic] = {
    t.url: t
    for t in (
        Topic(FLAG_CHANGED, "Flag changed",
              "Any new version of a Flag we raise: raised, re-raised, updated, acknowledged, escalated, "
              "closed or withdrawn (for integrations that keep a copy; responders subscribe to flag-alert).",
              _FLAG_FILTERS),
        # The one for responders: a version that changes nothing they must act on is not sent here.
        Topic(FLAG_ALERT, "Flag alert",
              "The Flag versions a responder must act on: raised or re-raised, a rise in priority, the "
              "rule's measure worse by at least the policy step since the last version on this topic, "
              "closed or withdrawn.", _FLAG_FILTERS),
        Topic(FLAG_ESCALATED, "Flag escalated",
              "A Flag of an escalated priority left unacknowledged past the policy interval for its "
              "priority: the Flag version each escalation writes, one per interval until it is "
              "acknowledged or closed. An acknowledgement made before a rise in priority no longer "
              "covers it.", _FLAG_FILTERS),
    )
}


@dataclass(frozen=True, slots=True)
class Filter:
    """One ``name=v1,v2`` criterion: any value matches (FHIR search comma = OR)."""

    name: str
    values: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class SubscriptionSpec:
    """What an accepted Subscription asks of us. ``filters`` are ANDed."""

    topic: str
    filters: tuple[Filter, ...]
    endpoint: str
    headers: tuple[str, ...]  # the channel.header strings, sent as given (they may hold credentials)
    payload_mime: str  # sent verbatim as Content-Type: the IG says it SHALL equal channel.payload
    content: str  # empty | id-only | full-resource
    form: str  # FORM_R4 | FORM_R4B
    heartbeat_period_s: int | None  # None = no heartbeats (backport-heartbeat-period absent)
    timeout_s: int | None  # None = the dispatcher's default
    max_count: int | None
    end: str | None  # Subscription.end as given (an instant)
    reason: str


# ---- matching ---------------------------------------------------------------------------------------


def matches(spec: SubscriptionSpec, flag: Mapping[str, Any]) -> bool:
    """Does this Flag JSON pass every filter of ``spec``? (Each topic has its own event source.)"""
    return all(any(_match_one(f.name, v, flag) for v in f.values) for f in spec.filters)


def _match_one(name: str, value: str, flag: Mapping[str, Any]) -> bool:
    if name == "patient":
        ref = (flag.get("subject") or {}).get("reference")
        # A subject known only by identifier has no literal reference, so it never matches `patient`.
        return isinstance(ref, str) and _patient_key(ref) == _patient_key(value)
    if name == "patient:identifier":
        return _identifier_token(value) in _subject_identifiers(flag)
    if name == "priority":
        return value in _priority_codes(flag)
    if name == "code":
        system, bar, code = value.rpartition("|")
        for coding in (flag.get("code") or {}).get("coding") or ():
            if coding.get("code") != code:
                continue
            # FHIR token search: `code` any system, `system|code` that system, `|code` no system.
            if not bar or (system == "" and "system" not in coding) or coding.get("system") == system:
                return True
        return False
    return False


def _subject_identifiers(flag: Mapping[str, Any]) -> set[tuple[str, str]]:
    """(system, value) of every identifier the Flag names its patient by: subject.identifier and each
    subject-alias extension's valueIdentifier."""
    subject = flag.get("subject") or {}
    found = [subject.get("identifier")] + [e.get("valueIdentifier") for e in subject.get("extension") or ()
                                           if e.get("url") == SUBJECT_ALIAS_URL]
    return {(i.get("system", ""), i.get("value", "")) for i in found if isinstance(i, Mapping)}


def _identifier_token(value: str) -> tuple[str, str]:
    system, _, ident = value.partition("|")
    return system, ident


def _priority_codes(flag: Mapping[str, Any]) -> set[str]:
    return {
        c.get("code")
        for ext in flag.get("extension") or ()
        if ext.get("url") == FLAG_PRIORITY_URL
        for c in (ext.get("valueCodeableConcept") or {}).get("coding") or ()
    }


def _patient_key(ref: str) -> str:
    """``Patient/1``, ``1`` and ``https://x/fhir/Patient/1`` all → ``Patient/1`` (history suffix dropped)."""
    path = ref.split("/_history/", 1)[0].rstrip("/")
    parts = path.split("/")
    return f"Patient/{parts[-1]}" if len(parts) == 1 or parts[-2] == "Patient" else path


# ---- parsing ----------------------------------------------------------------------------------------


def parse_subscription(
    resource: Mapping[str, Any], *, allow_http: bool = False
) -> SubscriptionSpec | list[Issue]:
    """Validate an R4 Subscription carrying the backport extensions; a spec, or every problem found.

    ``allow_http`` admits plain-http endpoints (loopback tests only: the IG strongly recommends
    refusing them, since notifications and channel headers would travel in clear).
    """
    issues: list[Issue] = []
    if resource.get("resourceType") != "Subscription":
        return [Issue("invalid", "the resource must be a Subscription", ("Subscription",))]
    status = resource.get("status")
    if status is not None and status not in _SUB_STATUS:
        issues.append(_bad("code-invalid", f"status must be one of {', '.join(_SUB_STATUS)}", "status"))
    reason = resource.get("reason")
    if not isinstance(reason, str) or not reason.strip():
        issues.append(_bad("required", "reason is required (R4 Subscription.reason 1..1)", "reason"))
    end = resource.get("end")
    if end is not None and not _is_instant(end):
        issues.append(_bad("value", "end must be an instant with a time zone", "end"))

    topic, filters = _criteria(resource, issues)
    channel = resource.get("channel")
    if not isinstance(channel, Mapping):
        issues.append(_bad("required", "channel is required", "channel"))
        return issues
    _channel_type(channel, issues)
    endpoint = _endpoint(channel.get("endpoint"), allow_http, issues)
    headers = _headers(channel.get("header"), issues)
    mime, form = _payload(channel.get("payload"), issues)
    content = _content(channel.get("_payload"), issues)
    heartbeat = _channel_int(channel, HEARTBEAT_URL, "valueUnsignedInt", 0, issues)
    timeout = _channel_int(channel, TIMEOUT_URL, "valueUnsignedInt", 1, issues)
    max_count = _channel_int(channel, MAX_COUNT_URL, "valuePositiveInt", 1, issues)
    if issues:
        return issues
    assert topic is not None and endpoint is not None and mime is not None and form is not None
    return SubscriptionSpec(
        topic=topic, filters=filters, endpoint=endpoint, headers=headers, payload_mime=mime,
        content=content, form=form,
        # A zero heartbeat period cannot mean "every 0 s"; treat it as no heartbeat.
        heartbeat_period_s=heartbeat or None, timeout_s=timeout, max_count=max_count,
        end=end, reason=str(reason).strip(),
    )


def _bad(code: str, message: str, path: str) -> Issue:
    return Issue(code, message, (f"Subscription.{path}",))


def _extensions(holder: Any, path: str, issues: list[Issue]) -> list[Any]:
    """``holder.extension`` as a list; a wrongly shaped one is reported rather than silently skipped."""
    if holder is None:
        return []
    extensions = holder.get("extension") if isinstance(holder, Mapping) else None
    if extensions is None and isinstance(holder, Mapping):
        return []
    if not isinstance(extensions, list):
        issues.append(_bad("structure", "extension must be a list of extensions", f"{path}.extension"))
        return []
    return extensions


def _is_instant(value: Any) -> bool:
    if not isinstance(value, str) or "T" not in value:
        return False
    try:
        return datetime.fromisoformat(value.replace("Z", "+00:00")).tzinfo is not None
    except ValueError:
        return False


def _criteria(resource: Mapping[str, Any], issues: list[Issue]) -> tuple[str | None, tuple[Filter, ...]]:
    criteria = resource.get("criteria")
    topic = TOPICS.get(criteria) if isinstance(criteria, str) else None
    if not isinstance(criteria, str) or not criteria:
        issues.append(_bad("required", "criteria must be the canonical URL of a topic", "criteria"))
    elif topic is None:
        known = ", ".join(sorted(TOPICS))
        issues.append(_bad("not-supported", f"unknown topic {criteria!r}; topics offered: {known}",
                           "criteria"))
    filters: list[Filter] = []
    extensions = _extensions(resource.get("_criteria"), "criteria", issues)
    for i, ext in enumerate(extensions):
        if not isinstance(ext, Mapping) or ext.get("url") != FILTER_CRITERIA_URL:
            continue  # other extensions on criteria are not modifiers: ignoring them is allowed
        path = f"criteria.extension[{i}]"
        value = ext.get("valueString")
        if not isinstance(value, str) or not value.strip():
            issues.append(_bad("required", "a filter criteria extension needs a valueString", path))
            continue
        filters.extend(_filter_string(value.strip(), topic, path, issues))
    return (topic.url if topic else None), tuple(filters)


def _filter_string(value: str, topic: Topic | None, path: str, issues: list[Issue]) -> list[Filter]:
    rtype, sep, query = value.partition("?")
    if not sep or rtype != "Flag":
        issues.append(_bad("value", "a filter must read 'Flag?name=value[&name=value]'", path))
        return []
    allowed = topic.filters if topic else _FLAG_FILTERS
    out: list[Filter] = []
    for pair in query.split("&"):
        name, eq, raw = pair.partition("=")
        if not eq or not name or not raw:
            issues.append(_bad("value", f"filter part {pair!r} must read name=value", path))
            continue
        if name not in allowed:
            offered = ", ".join(sorted(allowed))
            issues.append(_bad("not-supported", f"unknown filter {name!r}; this topic filters by {offered}",
                                path))
            continue
        values = tuple(unquote(v) for v in raw.split(","))
        problem = next((p for p in (_filter_value_problem(name, v) for v in values) if p), None)
        if problem:
            issues.append(_bad("value", problem, path))
            continue
        out.append(Filter(name, values))
    return out


def _filter_value_problem(name: str, value: str) -> str | None:
    if name == "patient":
        key = _patient_key(value)
        if not key.startswith("Patient/") or not _FHIR_ID.match(key.removeprefix("Patient/")):
            return f"patient filter {value!r} must be a Patient reference such as Patient/123"
    elif name == "patient:identifier":
        system, bar, ident = value.partition("|")
        if not bar or not system or not ident:
            return (f"patient:identifier filter {value!r} must read system|value, e.g. "
                    "urn:oid:2.16.840.1.113883.19.5|12345 (the MRN's system and value)")
    elif name == "priority":
        if value not in _PRIORITY_RANK:
            return f"priority filter {value!r} must be one of PH, PM, PL (flag-priority-code)"
    elif name == "code":
        system, bar, code = value.rpartition("|")
        if bar and system not in ("", RULE_SYSTEM):
            return f"code filter system must be {RULE_SYSTEM}; no Flag of ours carries another"
        if code not in {r.value for r in Rule}:
            return f"code filter {code!r} is not one of our rule codes"
    return None


def _channel_type(channel: Mapping[str, Any], issues: list[Issue]) -> None:
    ctype = channel.get("type")
    if ctype != "rest-hook":
        issues.append(_bad("not-supported", f"channel.type {ctype!r} is not offered; only rest-hook",
                           "channel.type"))
    type_extensions = _extensions(channel.get("_type"), "channel.type", issues)
    custom = [e for e in type_extensions if isinstance(e, Mapping) and e.get("url") == CHANNEL_TYPE_URL]
    if custom:
        issues.append(_bad("not-supported", "custom channel types (backport-channel-type) are not offered",
                           "channel.type.extension"))


def _endpoint(endpoint: Any, allow_http: bool, issues: list[Issue]) -> str | None:
    if not isinstance(endpoint, str) or not endpoint:
        issues.append(_bad("required", "channel.endpoint is required for rest-hook", "channel.endpoint"))
        return None
    try:
        parts = urlsplit(endpoint)
        parts.port  # noqa: B018 - raises ValueError on a malformed port
    except ValueError:
        parts = None
    if parts is None or parts.scheme not in ("https", "http") or not parts.hostname:
        issues.append(_bad("value", "channel.endpoint must be an absolute https URL", "channel.endpoint"))
        return None
    if parts.username or parts.password:
        # Credentials belong in channel.header, which we never log; a URL is logged and stored widely.
        issues.append(_bad("security", "channel.endpoint must not carry credentials; use channel.header",
                           "channel.endpoint"))
        return None
    if parts.scheme == "http" and not allow_http:
        issues.append(_bad("security", "channel.endpoint must use https: notifications and channel headers "
                           "would otherwise travel in clear", "channel.endpoint"))
        return None
    return endpoint


def _headers(raw: Any, issues: list[Issue]) -> tuple[str, ...]:
    if raw is None:
        return ()
    if not isinstance(raw, list):
        issues.append(_bad("structure", "channel.header must be a list of strings", "channel.header"))
        return ()
    for i, h in enumerate(raw):
        try:
            parse_header(h)
        except HeaderError as exc:
            issues.append(_bad("value", str(exc), f"channel.header[{i}]"))
    return tuple(h for h in raw if isinstance(h, str))


def _payload(raw: Any, issues: list[Issue]) -> tuple[str | None, str | None]:
    if not isinstance(raw, str) or not raw.strip():
        issues.append(_bad("required", f"channel.payload is required (backport-subscription 1..1): "
                           f"{FHIR_JSON}",
                           "channel.payload"))
        return None, None
    mime, *params = (p.strip() for p in raw.split(";"))
    if mime.lower() != FHIR_JSON:
        issues.append(_bad("not-supported", f"channel.payload {mime!r} is not offered; only {FHIR_JSON}",
                           "channel.payload"))
        return None, None
    form = FORM_R4  # our subscribers are R4 systems unless they say otherwise
    for p in params:
        key, _, value = p.partition("=")
        if key.strip().lower() == "fhirversion":
            chosen = _FORMS.get(value.strip().strip('"'))
            if chosen is None:
                issues.append(_bad("not-supported",
                                   f"fhirVersion {value.strip()!r} is not offered; use 4.0 or 4.3",
                                   "channel.payload"))
                return None, None
            form = chosen
    return raw.strip(), form


def _content(raw: Any, issues: list[Issue]) -> str:
    for i, ext in enumerate(_extensions(raw, "channel.payload", issues)):
        if isinstance(ext, Mapping) and ext.get("url") == PAYLOAD_CONTENT_URL:
            code = ext.get("valueCode")
            if code not in CONTENT_CODES:
                issues.append(_bad("code-invalid", f"payload content {code!r} must be one of "
                                   f"{', '.join(CONTENT_CODES)}", f"channel.payload.extension[{i}]"))
                return DEFAULT_CONTENT
            return str(code)
    return DEFAULT_CONTENT


def _channel_int(
    channel: Mapping[str, Any], url: str, key: str, minimum: int, issues: list[Issue]
) -> int | None:
    for i, ext in enumerate(_extensions(channel, "channel", issues)):
        if isinstance(ext, Mapping) and ext.get("url") == url:
            value = ext.get(key)
            if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
                name = url.rsplit("/", 1)[1]
                issues.append(_bad("value", f"{name} needs {key} >= {minimum}", f"channel.extension[{i}]"))
                return None
            return value
    return None
