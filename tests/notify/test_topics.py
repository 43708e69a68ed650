"""parse_subscription and matches (Subscriptions R5 Backport IG, backport-subscription)."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.errors import Issue
from service.fhir.flag_render import RULE_SYSTEM, FlagView, render_flag, subject_reference
from service.notify.topics import (
    FLAG_ALERT,
    FLAG_CHANGED,
    FLAG_ESCALATED,
    FORM_R4,
    FORM_R4B,
    TOPICS,
    Filter,
    SubscriptionSpec,
    matches,
    parse_subscription,
)

SD = "http://hl7.org/fhir/uv/subscriptions-backport/StructureDefinition"


def subscription(**over: Any) -> dict[str, Any]:
    """A valid backport Subscription (shape of the IG's BackportSubscriptionExampleAdmission)."""
    sub: dict[str, Any] = {
        "resourceType": "Subscription",
        "status": "requested",
        "reason": "Rapid-response paging for critical electrolyte flags",
        "criteria": FLAG_CHANGED,
        "_criteria": {"extension": [
            {"url": f"{SD}/backport-filter-criteria", "valueString": "Flag?patient=Patient/123&priority=PH"},
        ]},
        "channel": {
            "type": "rest-hook",
            "endpoint": "https://pager.example.org/hook",
            "header": ["Authorization: Bearer secret-token", "X-Team: rrt"],
            "payload": "application/fhir+json",
            "_payload": {"extension": [{"url": f"{SD}/backport-payload-content", "valueCode": "id-only"}]},
            "extension": [
                {"url": f"{SD}/backport-heartbeat-period", "valueUnsignedInt": 60},
                {"url": f"{SD}/backport-timeout", "valueUnsignedInt": 15},
                {"url": f"{SD}/backport-max-count", "valuePositiveInt": 5},
            ],
        },
    }
    sub.update(over)
    return sub


def with_channel(**over: Any) -> dict[str, Any]:
    sub = subscription()
    sub["channel"].update(over)
    return sub


def issues_of(result: SubscriptionSpec | list[Issue]) -> list[Issue]:
    assert isinstance(result, list), f"expected refusal, got {result!r}"
    assert result, "a refusal must name at least one issue"
    return result


def paths(result: SubscriptionSpec | list[Issue]) -> set[str]:
    return {e for i in issues_of(result) for e in i.expression}


def flag(*, patient: str = "Patient/123", priority: str = "high", rule: str = "sodium-critical-low",
         status: str = "active", version: int = 1) -> dict[str, Any]:
    at = datetime(2024, 3, 1, 8, 0, tzinfo=UTC)
    return render_flag(FlagView(
        id="f1", version_id=version, last_updated=at, status=status, rule=rule, episode="e1",
        priority=priority, period_start=at, period_end=None, evidence=["Observation/o1/_history/1"],
        numbers={"sodium": 118.0}, sentence="Sodium critically low", subject={"reference": patient},
        encounter=None, policy_hash="h",
    ))


# ---- accepted ---------------------------------------------------------------------------------------


def test_valid_subscription_gives_every_field() -> None:
    spec = parse_subscription(subscription())
    assert isinstance(spec, SubscriptionSpec), spec
    assert spec.topic == FLAG_CHANGED
    assert spec.filters == (Filter("patient", ("Patient/123",)), Filter("priority", ("PH",)))
    assert spec.endpoint == "https://pager.example.org/hook"
    assert spec.headers == ("Authorization: Bearer secret-token", "X-Team: rrt")
    assert spec.payload_mime == "application/fhir+json"
    assert (spec.content, spec.form) == ("id-only", FORM_R4)
    assert (spec.heartbeat_period_s, spec.timeout_s, spec.max_count) == (60, 15, 5)
    with pytest.raises(AttributeError):
        spec.topic = FLAG_ESCALATED  # type: ignore[misc]  # frozen


def test_defaults_when_optional_parts_absent() -> None:
    sub = subscription()
    del sub["_criteria"]
    del sub["channel"]["_payload"], sub["channel"]["extension"], sub["channel"]["header"]
    spec = parse_subscription(sub)
    assert isinstance(spec, SubscriptionSpec), spec
    assert spec.filters == ()
    assert spec.headers == ()
    assert spec.content == "id-only"  # IG's balanced default, and ours
    assert (spec.heartbeat_period_s, spec.timeout_s, spec.max_count) == (None, None, None)


@pytest.mark.parametrize(("mime", "form"), [
    ("application/fhir+json", FORM_R4),
    ("application/fhir+json; fhirVersion=4.0", FORM_R4),
    ("application/fhir+json;fhirVersion=4.3", FORM_R4B),
    ("application/fhir+json; charset=utf-8; fhirVersion=4.3", FORM_R4B),
])
def test_payload_mime_picks_the_notification_form(mime: str, form: str) -> None:
    spec = parse_subscription(with_channel(payload=mime))
    assert isinstance(spec, SubscriptionSpec), spec
    assert spec.form == form
    assert spec.payload_mime == mime  # sent back verbatim as Content-Type


def test_several_filter_extensions_and_comma_values() -> None:
    sub = subscription()
    sub["_criteria"]["extension"] = [
        {"url": f"{SD}/backport-filter-criteria", "valueString": "Flag?priority=PH,PM"},
        {"url": f"{SD}/backport-filter-criteria",
         "valueString": f"Flag?code={RULE_SYSTEM}|sodium-critical-low"},
    ]
    spec = parse_subscription(sub)
    assert isinstance(spec, SubscriptionSpec), spec
    assert spec.filters == (Filter("priority", ("PH", "PM")),
                            Filter("code", (f"{RULE_SYSTEM}|sodium-critical-low",)))


def test_http_endpoint_only_with_allow_http() -> None:
    sub = with_channel(endpoint="http://127.0.0.1:8123/hook")
    assert paths(parse_subscription(sub)) == {"Subscription.channel.endpoint"}
    spec = parse_subscription(sub, allow_http=True)
    assert isinstance(spec, SubscriptionSpec) and spec.endpoint == "http://127.0.0.1:8123/hook"


# ---- refused, each with its FHIRPath -------------------------------------------------------------------


def test_plain_http_refused() -> None:
    [issue] = issues_of(parse_subscription(with_channel(endpoint="http://pager.example.org/hook")))
    assert issue.expression == ("Subscription.channel.endpoint",)
    assert "https" in issue.message


@pytest.mark.parametrize("endpoint", ["pager.example.org/hook", "ftp://pager.example.org/x", "https://",
                                      "https://user:pw@pager.example.org/hook", ""])
def test_bad_endpoints_refused(endpoint: str) -> None:
    assert paths(parse_subscription(with_channel(endpoint=endpoint))) == {"Subscription.channel.endpoint"}


def test_unknown_topic_refused() -> None:
    [issue] = issues_of(parse_subscription(subscription(criteria="Flag?category=clinical")))
    assert issue.expression == ("Subscription.criteria",)
    assert issue.code == "not-supported"
    assert FLAG_CHANGED in issue.message  # tells the subscriber what is offered


def test_unknown_filter_refused() -> None:
    sub = subscription()
    sub["_criteria"]["extension"][0]["valueString"] = "Flag?patient=Patient/123&category=clinical"
    [issue] = issues_of(parse_subscription(sub))
    assert issue.expression == ("Subscription.criteria.extension[0]",)
    assert "'category'" in issue.message


@pytest.mark.parametrize("criteria", [
    "Observation?patient=Patient/1", "patient=Patient/1", "Flag?patient", "Flag?priority=HIGH",
    "Flag?code=no-such-rule", "Flag?code=http://loinc.org|2951-2", "Flag?patient=Group/7",
    "Flag?patient:missing=true",
])
def test_bad_filter_values_refused(criteria: str) -> None:
    sub = subscription()
    sub["_criteria"]["extension"][0]["valueString"] = criteria
    assert paths(parse_subscription(sub)) == {"Subscription.criteria.extension[0]"}


@pytest.mark.parametrize("content", ["full", "ID-ONLY", None])
def test_bad_payload_content_refused(content: str | None) -> None:
    sub = subscription()
    sub["channel"]["_payload"]["extension"][0]["valueCode"] = content
    assert paths(parse_subscription(sub)) == {"Subscription.channel.payload.extension[0]"}


@pytest.mark.parametrize("ctype", ["websocket", "email", "message", None])
def test_bad_channel_type_refused(ctype: str | None) -> None:
    [issue] = issues_of(parse_subscription(with_channel(type=ctype)))
    assert issue.expression == ("Subscription.channel.type",)
    assert "rest-hook" in issue.message


def test_custom_channel_type_refused() -> None:
    coding = {"system": "https://x.example", "code": "chat"}
    custom = {"url": f"{SD}/backport-channel-type", "valueCoding": coding}
    sub = with_channel(_type={"extension": [custom]})
    assert paths(parse_subscription(sub)) == {"Subscription.channel.type.extension"}


@pytest.mark.parametrize("payload", ["application/fhir+xml", "application/json", None,
                                     "application/fhir+json; fhirVersion=5.0"])
def test_bad_payload_mime_refused(payload: str | None) -> None:
    assert paths(parse_subscription(with_channel(payload=payload))) == {"Subscription.channel.payload"}


@pytest.mark.parametrize("header", ["no-colon", "Bad Name: x", "X-A: one\r\nX-B: two",
                                    "Content-Type: text/plain"])
def test_bad_header_refused_without_echoing_it(header: str) -> None:
    [issue] = issues_of(parse_subscription(with_channel(header=["X-Ok: 1", header])))
    assert issue.expression == ("Subscription.channel.header[1]",)
    value = header.partition(":")[2].strip()
    if value:
        assert value not in issue.message  # header values may be credentials


def test_bad_channel_extension_values_refused() -> None:
    sub = subscription()
    sub["channel"]["extension"] = [
        {"url": f"{SD}/backport-heartbeat-period", "valueUnsignedInt": -1},
        {"url": f"{SD}/backport-timeout", "valueUnsignedInt": "15"},
        {"url": f"{SD}/backport-max-count", "valuePositiveInt": 0},
    ]
    assert paths(parse_subscription(sub)) == {f"Subscription.channel.extension[{i}]" for i in range(3)}


def test_every_problem_reported_at_once() -> None:
    sub = subscription(criteria="https://elsewhere.example/topic", reason="")
    sub["channel"].update(type="email", endpoint="http://x.example/", payload="text/plain")
    assert paths(parse_subscription(sub)) == {
        "Subscription.criteria", "Subscription.reason", "Subscription.channel.type",
        "Subscription.channel.endpoint", "Subscription.channel.payload",
    }


def test_not_a_subscription_or_no_channel() -> None:
    assert paths(parse_subscription({"resourceType": "Flag"})) == {"Subscription"}
    sub = subscription()
    del sub["channel"]
    assert paths(parse_subscription(sub)) == {"Subscription.channel"}


# ---- matches ----------------------------------------------------------------------------------------


def spec_with(*criteria: str) -> SubscriptionSpec:
    sub = subscription()
    sub["_criteria"]["extension"] = [{"url": f"{SD}/backport-filter-criteria", "valueString": c}
                                     for c in criteria]
    spec = parse_subscription(sub)
    assert isinstance(spec, SubscriptionSpec), spec
    return spec


def test_no_filters_match_everything() -> None:
    assert matches(spec_with(), flag())
    assert matches(spec_with(), flag(patient="Patient/999", priority="low"))


def flag_of(*aliases: str) -> dict[str, Any]:
    return {**flag(), "subject": subject_reference(aliases)}


def test_patient_identifier_filter_matches_the_subjects_identifier() -> None:
    spec = spec_with("Flag?patient:identifier=urn:mrn|9")
    assert matches(spec, flag_of("id:urn:mrn|9", "ref:Patient/p9"))
    assert not matches(spec, flag_of("id:urn:mrn|90"))
    assert not matches(spec, flag_of("id:urn:other|9"))  # the same value under another system is another patient
    assert not matches(spec, flag_of("ref:Patient/9"))


def test_patient_identifier_filter_matches_an_identifier_listed_as_a_further_alias() -> None:
    spec = spec_with("Flag?patient:identifier=urn:z-mrn|X-9")
    subject = flag_of("id:urn:a-mrn|1", "id:urn:z-mrn|X-9")["subject"]
    assert subject["identifier"] == {"system": "urn:a-mrn", "value": "1"}  # the other one is in the extension
    assert matches(spec, flag_of("id:urn:a-mrn|1", "id:urn:z-mrn|X-9"))


def test_patient_identifier_filter_values_are_ored() -> None:
    spec = spec_with("Flag?patient:identifier=urn:mrn|1,urn:mrn|2")
    assert matches(spec, flag_of("id:urn:mrn|2"))


def test_patient_identifier_filter_without_a_system_is_refused() -> None:
    sub = subscription()
    sub["_criteria"]["extension"][0]["valueString"] = "Flag?patient:identifier=|9"
    issues = parse_subscription(sub)
    assert isinstance(issues, list) and "system|value" in issues[0].message


def test_patient_filter() -> None:
    spec = spec_with("Flag?patient=Patient/123")
    assert matches(spec, flag(patient="Patient/123"))
    assert matches(spec, flag(patient="https://ehr.example/fhir/Patient/123"))  # absolute reference
    assert not matches(spec, flag(patient="Patient/1234"))
    assert matches(spec_with("Flag?patient=123"), flag(patient="Patient/123"))  # bare id means Patient/
    # A subject known only by identifier has no reference to compare.
    by_identifier = flag()
    by_identifier["subject"] = {"identifier": {"system": "urn:mrn", "value": "123"}}
    assert not matches(spec, by_identifier)


def test_priority_filter_with_or_values() -> None:
    spec = spec_with("Flag?priority=PH,PM")
    assert matches(spec, flag(priority="high"))
    assert matches(spec, flag(priority="medium"))
    assert not matches(spec, flag(priority="low"))


def test_code_filter_token_forms() -> None:
    low = flag(rule="sodium-critical-low")
    assert matches(spec_with("Flag?code=sodium-critical-low"), low)
    assert matches(spec_with(f"Flag?code={RULE_SYSTEM}|sodium-critical-low"), low)
    assert not matches(spec_with("Flag?code=|sodium-critical-low"), low)  # `|code` = no system
    assert not matches(spec_with("Flag?code=potassium-critical-high"), low)


def test_filters_are_anded_across_extensions_and_within_one() -> None:
    one = spec_with("Flag?patient=Patient/123&priority=PH")
    two = spec_with("Flag?patient=Patient/123", "Flag?priority=PH")
    for spec in (one, two):
        assert matches(spec, flag(patient="Patient/123", priority="high"))
        assert not matches(spec, flag(patient="Patient/123", priority="medium"))
        assert not matches(spec, flag(patient="Patient/9", priority="high"))


# ---- topics -----------------------------------------------------------------------------------------


def test_topic_canonicals_live_under_our_base() -> None:
    assert set(TOPICS) == {FLAG_CHANGED, FLAG_ALERT, FLAG_ESCALATED}
    assert FLAG_CHANGED == "https://lytestream.example/fhir/SubscriptionTopic/flag-changed"
    assert FLAG_ALERT == "https://lytestream.example/fhir/SubscriptionTopic/flag-alert"
    assert all(t.filters == {"patient", "patient:identifier", "priority", "code"} for t in TOPICS.values())


def test_responder_topic_accepted_with_the_same_filters() -> None:
    spec = parse_subscription(subscription(criteria=FLAG_ALERT))  # filtered by patient and priority
    assert isinstance(spec, SubscriptionSpec) and spec.topic == FLAG_ALERT
    assert [f.name for f in spec.filters] == ["patient", "priority"]


def test_escalated_topic_accepted_and_fired() -> None:
    spec = parse_subscription(subscription(criteria=FLAG_ESCALATED))
    assert isinstance(spec, SubscriptionSpec) and spec.topic == FLAG_ESCALATED


# ---- robustness -------------------------------------------------------------------------------------


def test_fixture_is_a_valid_r4b_subscription() -> None:
    # Guards the tests above: the accepted shape is a real (R4-style) Subscription with the IG's extensions.
    from fhir.resources.R4B import get_fhir_model_class

    get_fhir_model_class("Subscription").model_validate(subscription())


_JSON = st.recursive(
    st.none() | st.booleans() | st.integers(-3, 3) | st.text(max_size=8),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=6), inner, max_size=3),
    max_leaves=6,
)
_PLACES = [("criteria",), ("_criteria",), ("_criteria", "extension"), ("reason",), ("end",), ("status",),
           ("channel",), ("channel", "type"), ("channel", "_type"), ("channel", "endpoint"),
           ("channel", "header"), ("channel", "payload"), ("channel", "_payload"),
           ("channel", "_payload", "extension"), ("channel", "extension")]


@settings(max_examples=300, deadline=None)
@given(place=st.sampled_from(_PLACES), junk=_JSON)
def test_malformed_parts_give_issues_never_exceptions(place: tuple[str, ...], junk: Any) -> None:
    sub = subscription()
    holder: Any = sub
    for key in place[:-1]:
        holder = holder[key]
    holder[place[-1]] = junk
    result = parse_subscription(sub)
    if isinstance(result, list):
        assert result and all(isinstance(i, Issue) and i.expression for i in result)
    else:
        assert isinstance(result, SubscriptionSpec)


def test_wrongly_shaped_extension_lists_are_reported() -> None:
    sub = subscription()
    sub["_criteria"] = {"extension": "Flag?patient=Patient/1"}
    sub["channel"]["extension"] = {"url": "x"}
    assert paths(parse_subscription(sub)) == {"Subscription.criteria.extension",
                                              "Subscription.channel.extension"}
