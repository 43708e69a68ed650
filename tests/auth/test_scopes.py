"""SMART scopes read into grants. Scope strings come from the SMART App Launch 2.x page
"Scopes and Launch Context" (hl7.org/fhir/smart-app-launch/scopes-and-launch-context.html), named
beside each check as SMART-2 §<section>."""

from __future__ import annotations

import pytest

from service.auth.scopes import (
    Grant,
    ScopeError,
    allows,
    needed_scope,
    parse_scope,
    parse_scopes,
    parse_strict,
    strict_scope_string,
)

ALL = frozenset("cruds")


@pytest.mark.parametrize(
    ("scope", "resource_type", "letters"),
    [
        # SMART-2 §System-level scopes: "Alert engine to monitor all lab observations" → system/Observation.rs
        ("system/Observation.rs", "Observation", "rs"),
        # SMART-2 §System-level scopes: "Perform bulk data export across all available data" → system/*.rs
        ("system/*.rs", "*", "rs"),
        # SMART-2 §System-level scopes: "System-level bridge, turning a V2 ADT feed into FHIR Encounter
        # resources" → system/Encounter.cud
        ("system/Encounter.cud", "Encounter", "cud"),
        # SMART-2 §Scopes for requesting clinical data: "use scope patient/Observation.cu" (create and
        # update), here at system level
        ("system/Observation.cu", "Observation", "cu"),
        # SMART-2 §Quick Start: user/*.cruds, at system level ("system/*.cruds" in §delegate access)
        ("system/*.cruds", "*", "cruds"),
        ("system/Flag.rs", "Flag", "rs"),
        ("system/*.r", "*", "r"),
    ],
)
def test_v2_system_scopes(scope: str, resource_type: str, letters: str) -> None:
    assert parse_scope(scope) == Grant(resource_type, frozenset(letters))


@pytest.mark.parametrize(
    ("v1", "v2"),
    [
        # SMART-2 §Scopes for requesting clinical data: "v1 .read ⇒ v2 .rs"
        ("system/Observation.read", "rs"),
        # SMART-2 same list: "v1 .write ⇒ v2 .cud"
        ("system/Observation.write", "cud"),
        # SMART-2 same list: "v1 .* ⇒ v2 .cruds"
        ("system/Observation.*", "cruds"),
    ],
)
def test_v1_scopes_map_as_the_spec_says(v1: str, v2: str) -> None:
    assert parse_scope(v1).interactions == frozenset(v2)


def test_a_v1_read_scope_allows_search_and_read_but_not_create() -> None:
    grants = parse_scopes("system/Observation.read").grants
    assert allows(grants, "Observation", "r")
    assert allows(grants, "Observation", "s")
    assert not allows(grants, "Observation", "c")
    assert not allows(grants, "Observation", "u")
    assert not allows(grants, "Observation", "d")


def test_scope_equivalence_compounded_and_expanded() -> None:
    # SMART-2 §Scope Equivalence: "Observation.rs is interchangeable with Observation.r Observation.s"
    compounded = parse_scopes("system/Observation.rs").grants
    expanded = parse_scopes("system/Observation.r system/Observation.s").grants
    for letter in "cruds":
        assert allows(compounded, "Observation", letter) == allows(expanded, "Observation", letter)


def test_wildcard_covers_every_type_but_only_its_letters() -> None:
    grants = parse_scopes("system/*.rs").grants  # SMART-2 §System-level scopes (bulk export)
    assert allows(grants, "Flag", "r") and allows(grants, "Observation", "s")
    assert not allows(grants, "Observation", "c")


def test_a_grant_covers_only_its_own_type() -> None:
    grants = parse_scopes("system/Flag.rs").grants
    assert allows(grants, "Flag", "s")
    assert not allows(grants, "Observation", "s")


@pytest.mark.parametrize(
    "scope",
    [
        # SMART-2 §Scopes for requesting clinical data: "a request of .dus is not a defined scope request"
        "system/Observation.dus",
        "system/Observation.sr",  # out of order
        "system/Observation.",
        "system/Observation.rr",
        # FHIR types are PascalCase (SMART-2 §Patient-specific: "patient" the level vs "Patient" the resource)
        "system/observation.rs",
    ],
)
def test_undefined_or_out_of_order_permissions_grant_nothing(scope: str) -> None:
    parsed = parse_scopes(scope)
    assert parsed.grants == ()
    assert [s for s, _ in parsed.ignored] == [scope]


@pytest.mark.parametrize(
    "scope",
    [
        # SMART-2 §Patient-specific scopes: "Read and search for all observations about a patient"
        "patient/Observation.rs",
        "patient/Patient.r",  # SMART-2 §Patient-specific scopes: "Read demographics about a patient"
        "patient/*.cruds",  # SMART-2 §Patient-specific scopes: "Read all available data about a patient"
        "user/Observation.rs",  # SMART-2 §User-level scopes: "Read a feed of all new lab observations"
        "user/Appointment.cruds",  # SMART-2 §User-level scopes: "Manage all appointments"
    ],
)
def test_patient_and_user_scopes_grant_nothing_to_a_system_service(scope: str) -> None:
    parsed = parse_scopes(scope)
    assert parsed.grants == ()
    assert "system-to-system" in parsed.ignored[0][1]


def test_a_query_suffix_makes_the_scope_grant_nothing() -> None:
    # SMART-2 §Finer-grained resource constraints: the laboratory-category example, at system level
    scope = ("system/Observation.rs"
             "?category=http://terminology.hl7.org/CodeSystem/observation-category|laboratory")
    parsed = parse_scopes(scope)
    assert parsed.grants == ()
    assert not allows(parsed.grants, "Observation", "r")  # ignoring the suffix would have widened the grant


def test_non_clinical_scopes_are_passed_over_and_clinical_ones_kept() -> None:
    # SMART-2 §Quick Start ("openid fhirUser", "launch/patient", "offline_access") and §Extensibility
    # ("__profilePhoto.manage"), beside a clinical scope
    parsed = parse_scopes("openid fhirUser launch/patient offline_access __profilePhoto.manage "
                          "system/Flag.rs")
    assert parsed.grants == (Grant("Flag", frozenset("rs")),)
    assert len(parsed.ignored) == 5


def test_an_empty_scope_string_grants_nothing() -> None:
    # SMART-2 §Wildcard scopes, granted-scope table: `""` — "chose to not grant any of the requested scopes"
    assert parse_scopes("").grants == ()


def test_strict_parsing_refuses_what_lenient_parsing_sets_aside() -> None:
    assert parse_strict("system/Observation.cu system/Flag.rs") == (
        Grant("Observation", frozenset("cu")), Grant("Flag", frozenset("rs")))
    for bad in ("patient/Observation.rs", "system/Observation.rs?category=x", "openid", ""):
        with pytest.raises(ScopeError):
            parse_strict(bad)


def test_allows_refuses_an_unknown_interaction() -> None:
    with pytest.raises(ValueError, match="interaction"):
        allows((Grant("*", ALL),), "Observation", "x")
    with pytest.raises(ValueError, match="interaction"):
        allows((Grant("*", ALL),), "Observation", "rs")


def test_needed_scope_is_the_shortest_v2_form() -> None:
    assert needed_scope("Observation", {"u", "c"}) == "system/Observation.cu"
    assert Grant("Flag", frozenset("sr")).scope == "system/Flag.rs"


def test_our_admin_scope_is_read_apart_from_the_clinical_grants() -> None:
    parsed = parse_scopes("system/Subscription.rs lytestream/admin")
    assert parsed.admin is True
    assert parsed.grants == (Grant("Subscription", frozenset("rs")),)
    assert parsed.ignored == ()


@pytest.mark.parametrize("scope", ["system/*.cruds", "system/Subscription.*", "system/Subscription.cruds",
                                   "lytestream/admin.read", "Lytestream/Admin"])
def test_no_clinical_scope_and_no_look_alike_is_the_admin_scope(scope: str) -> None:
    assert parse_scopes(scope).admin is False


def test_strict_parsing_keeps_the_admin_scope_but_still_wants_a_grant() -> None:
    assert strict_scope_string("system/Subscription.read lytestream/admin") == \
        "system/Subscription.rs lytestream/admin"
    with pytest.raises(ScopeError):
        strict_scope_string("lytestream/admin")  # on its own it lets the holder do nothing
