"""A unit that UCUM reads but that is no concentration is a 422 naming it, never a server error.

UCUM §2.6 (annotations): "{rbc}" alone is a valid UCUM unit of one (UCUM functional tests 1-119
"{e}", ucum.org/docs/functional-tests), so it parses, yet it is no moles per volume.
2951-2 is "Sodium [Moles/volume] in Serum or Plasma" (LOINC).
"""

# Sodium 140 mmol/L is an ordinary value inside the reference interval (common practice): these tests
# are about the unit, not the level.

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient

from tests.factories import HEADERS, dumps, observation


@pytest.mark.parametrize("unit", ["{rbc}", "{}"])
def test_an_annotation_alone_as_the_unit_is_a_422_naming_it(client: TestClient, unit: str) -> None:
    r = client.post("/fhir/Observation", content=dumps(observation(value=140, unit=unit)), headers=HEADERS)
    assert r.status_code == 422
    (issue, *_) = r.json()["issue"]
    assert issue["severity"] == "error" and f"'{unit}'" in issue["diagnostics"]
    assert issue["expression"] and issue["expression"][0].startswith("Observation.value")
