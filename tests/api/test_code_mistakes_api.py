"""A result under a likely mistyped watched code: not stored, but said as a warning, counted per client.

2951-2 is "Sodium [Moles/volume] in Serum or Plasma" (LOINC); 2951-3 fails the LOINC mod-10 check
digit (LOINC Users' Guide). LOINC's system is http://loinc.org (FHIR R4 terminologies-systems.html).
Sodium 115 mmol/L stands for a result at or below the critical low of 120 mmol/L (RCPath G158 2017;
Kost GJ, JAMA 1990;263:704-707).
"""

from __future__ import annotations

from fastapi.testclient import TestClient

from tests.factories import HEADERS, bundle, dumps, observation


def test_a_typo_in_the_check_digit_is_named_in_the_entry_and_the_good_entry_is_stored(client: TestClient) -> None:
    r = client.post("/fhir", content=dumps(bundle("batch", observation("typo", code="2951-3", value=115),
                                                  observation("good", value=115))), headers=HEADERS)
    typo, good = r.json()["entry"]
    assert typo["response"]["status"].startswith("200") and "location" not in typo["response"]
    (issue,) = typo["response"]["outcome"]["issue"]
    assert issue["severity"] == "warning" and issue["code"] == "code-invalid"
    assert "2951-3" in issue["diagnostics"] and "2951-2" in issue["diagnostics"]
    assert "not stored" in issue["diagnostics"]
    assert good["response"]["status"].startswith("201")


def test_a_mistyped_system_is_named(client: TestClient) -> None:
    obs = observation("sys", value=115)
    obs["code"]["coding"][0]["system"] = "http://loinc.com"
    r = client.post("/fhir", content=dumps(bundle("batch", obs)), headers=HEADERS)
    (issue,) = r.json()["entry"][0]["response"]["outcome"]["issue"]
    assert "http://loinc.com" in issue["diagnostics"] and "http://loinc.org" in issue["diagnostics"]


def test_an_unwatched_code_is_still_a_plain_drop(client: TestClient) -> None:
    r = client.post("/fhir", content=dumps(bundle("batch", observation("cr", code="2160-0", unit="umol/L"))),
                    headers=HEADERS)
    (issue,) = r.json()["entry"][0]["response"]["outcome"]["issue"]
    assert issue["severity"] == "information"
    assert client.get("/fhir/AuditEvent?subtype=dropped-code").json()["entry"] == []


def test_suspect_drops_are_counted_per_client_in_the_audit_and_the_summary(client: TestClient) -> None:
    for i in range(2):
        client.post("/fhir", content=dumps(bundle("batch", observation(f"t{i}a", code="2951-3"),
                                                  observation(f"t{i}b", code="2823-4"))), headers=HEADERS)
    events = [e["resource"] for e in client.get("/fhir/AuditEvent?subtype=dropped-code").json()["entry"]]
    assert len(events) == 2
    assert all(e["agent"][0]["who"]["identifier"]["value"] == "test-suite" for e in events)
    summary = client.get("/fhir/Flag/$summary?start=2026-03-01&end=2026-03-03").json()
    # The figure as the summary serves it today (a JSON object, or Parameters once it is one): the
    # client's count, 4 = 2 requests x 2 typos.
    assert '"results_dropped_under_suspect_codes"' in dumps(summary).decode()
    assert _count_for(summary, "test-suite") == 4


def _count_for(summary: dict[str, object], client: str) -> int | None:
    """The per-client count, found wherever the summary nests it."""
    if "results_dropped_under_suspect_codes" in summary:
        return summary["results_dropped_under_suspect_codes"]["by_client"].get(client)  # type: ignore[index, no-any-return]
    for p in summary.get("parameter", []):  # type: ignore[attr-defined]
        if p["name"] == "results_dropped_under_suspect_codes":
            for part in p["part"]:
                if part["name"] == "by_client":
                    return next((c["valueInteger"] for c in part["part"] if c["name"] == client), None)
    return None


def test_a_wrong_check_digit_with_no_system_is_named_and_counted(client: TestClient) -> None:
    obs = observation("nosys", code="2951-3", value=115)
    del obs["code"]["coding"][0]["system"]
    r = client.post("/fhir", content=dumps(bundle("batch", obs)), headers=HEADERS)
    (issue,) = r.json()["entry"][0]["response"]["outcome"]["issue"]
    assert issue["severity"] == "warning"
    assert "2951-2" in issue["diagnostics"] and "no system" in issue["diagnostics"]
    (event,) = [e["resource"] for e in client.get("/fhir/AuditEvent?subtype=dropped-code").json()["entry"]]
    assert event["agent"][0]["who"]["identifier"]["value"] == "test-suite"
