"""The timeline the rules read: usable results only, effective-time order, same outcome for any arrival order."""

from __future__ import annotations

import random
from datetime import UTC, datetime, timedelta

import pytest
from fastapi.testclient import TestClient

from service.api.context import AppContext
from service.db.reads import patient_key_for
from service.db.timeline import load_timeline
from service.domain.values import Analyte, Specimen, Timeline
from tests.factories import HEADERS, bundle, dumps, insulin, observation

END = datetime(2026, 3, 3, 0, 0, tzinfo=UTC)


def send(client: TestClient, *resources: dict) -> None:
    r = client.post("/fhir", content=dumps(bundle("batch", *resources)), headers=HEADERS)
    assert r.status_code == 200
    assert all(e["response"]["status"].startswith("20") for e in r.json()["entry"]), r.text


def timeline(ctx: AppContext, patient: str = "Patient/p1", hours: float = 72) -> Timeline:
    with ctx.db.session() as session:
        key = patient_key_for(session=session, alias=f"ref:{patient}")
        assert key is not None
        return load_timeline(session=session, patient_key=key, end=END, lookback=timedelta(hours=hours))


def values(t: Timeline) -> list[float | None]:
    return [r.value for r in t.results]


def test_results_come_in_effective_order_not_arrival(client: TestClient, context: AppContext) -> None:
    send(client, observation("c", effective="2026-03-02T12:00:00+00:00", value=126))
    send(client, observation("a", effective="2026-03-02T04:00:00+00:00", value=118))
    send(client, observation("b", effective="2026-03-02T08:00:00+02:00", value=122))  # 06:00Z
    assert values(timeline(context)) == [118, 122, 126]


def test_window_excludes_results_older_than_the_lookback(client: TestClient, context: AppContext) -> None:
    send(client, observation("old", effective="2026-02-27T00:00:00+00:00"),
         observation("new", effective="2026-03-02T00:00:00+00:00"))
    assert len(timeline(context, hours=72).results) == 1


def test_entered_in_error_and_cancelled_results_are_left_out(client: TestClient, context: AppContext) -> None:
    send(client, observation("a", value=118), observation("b", value=119, effective="2026-03-02T09:00:00+00:00"))
    send(client, observation("a", value=118, status="entered-in-error"),
         observation("c", value=None, status="cancelled", effective="2026-03-02T10:00:00+00:00"))
    assert values(timeline(context)) == [119]


def test_replaced_result_is_left_out_whichever_arrives_first(client: TestClient, context: AppContext) -> None:
    replacement = observation("new", value=124, extension=[{
        "url": "http://hl7.org/fhir/StructureDefinition/observation-replaces",
        "valueReference": {"identifier": {"system": "https://lab.example.org/result-id", "value": "old"}}}])
    send(client, replacement)
    send(client, observation("old", value=104))
    assert values(timeline(context)) == [124]


def test_urine_results_are_stored_but_marked_urine(client: TestClient, context: AppContext) -> None:
    send(client, observation("u", code="2955-3", value=20), observation("s", value=130))
    t = timeline(context)
    assert sorted(r.specimen for r in t.results) == sorted([Specimen.URINE, Specimen.SERUM_PLASMA])
    assert t.of(Analyte.SODIUM, Specimen.SERUM_PLASMA)[0].value == 130


def test_glucose_in_mg_dl_is_held_in_mmol_l(client: TestClient, context: AppContext) -> None:
    # arithmetic from M(glucose) = 180.156 g/mol (IUPAC conventional atomic weights): mg/dL x 0.0555074 = mmol/L; 600 mg/dL = 33.304 mmol/L.
    send(client, observation("g", code="2345-7", value=600, unit="mg/dL"))
    assert timeline(context).results[0].value == pytest.approx(33.3045, abs=1e-3)


def test_insulin_exposure_open_while_in_progress(client: TestClient, context: AppContext) -> None:
    send(client, insulin("m1", start="2026-03-02T06:00:00+00:00"))
    (exposure,) = timeline(context).exposures
    assert exposure.end is None and exposure.route == "intravenous"


def test_insulin_exposure_closes_when_the_stop_arrives(client: TestClient, context: AppContext) -> None:
    send(client, insulin("m1"))
    send(client, insulin("m1", end="2026-03-02T10:00:00+00:00", status="completed"))
    (exposure,) = timeline(context).exposures
    assert exposure.end == datetime(2026, 3, 2, 10, tzinfo=UTC)


def test_correction_moving_a_result_to_another_patient_leaves_the_first(
    client: TestClient, context: AppContext
) -> None:
    send(client, observation("a", patient="Patient/p1"), observation("keep", patient="Patient/p1", value=140))
    send(client, observation("a", patient="Patient/p2", status="corrected"))
    assert values(timeline(context, "Patient/p1")) == [140]
    assert len(timeline(context, "Patient/p2").results) == 1


def test_shuffled_stream_with_duplicates_gives_the_same_timeline(
    client: TestClient, context: AppContext
) -> None:
    stream = [
        observation("a", value=112, effective="2026-03-02T00:00:00+00:00", status="preliminary"),
        observation("a", value=113, effective="2026-03-02T00:00:00+00:00", status="final"),
        observation("b", value=118, effective="2026-03-02T06:00:00+00:00"),
        observation("b", value=117, effective="2026-03-02T06:00:00+00:00", status="corrected"),
        observation("c", value=121, effective="2026-03-02T12:00:00+00:00"),
        observation("d", value=150, effective="2026-03-02T11:00:00+00:00"),
        observation("d", value=150, effective="2026-03-02T11:00:00+00:00", status="entered-in-error"),
    ]
    rng = random.Random(7)
    shuffled = stream + rng.sample(stream, 3)
    rng.shuffle(shuffled)
    for r in shuffled:
        send(client, r)
    assert values(timeline(context)) == [113, 117, 121]
