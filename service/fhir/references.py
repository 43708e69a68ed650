"""Patient references → identity aliases.

A feed names one patient many ways: ``Patient/123``, an in-Bundle ``urn:uuid``, a
``Reference.identifier``, or a conditional ``Patient?identifier=system|value``. Each becomes one or
more aliases (``ref:Patient/123``, ``id:system|value``); the store maps every alias of one reference
to one internal patient key.

lytestream holds no Patient resources, so a conditional reference is read as the identifier it
names rather than searched: it cannot fail to match as it would on a Patient server.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any
from urllib.parse import parse_qsl

from service.errors import Issue
from service.fhir.normalise import IncomingPatient, Invalid

__all__ = ["BundleIdentities", "patient_aliases", "served_subject_alias", "urn_references"]

BundleIdentities = Mapping[str, tuple[str, ...]]  # fullUrl → aliases of the Patient entry it names


def served_subject_alias(subject: Mapping[str, Any]) -> str:
    """The alias of a subject as the service serves it (a literal reference or one identifier)."""
    if "reference" in subject:
        return f"ref:{subject['reference']}"
    return f"id:{subject['identifier']['system']}|{subject['identifier']['value']}"


def patient_entry_aliases(patient: IncomingPatient, request_url: str | None) -> tuple[str, ...]:
    aliases = [f"id:{s}|{v}" for s, v in patient.identifiers]
    if patient.id:
        aliases.append(f"ref:Patient/{patient.id}")
    elif request_url and request_url.startswith("Patient/"):
        aliases.append(f"ref:{request_url}")
    return tuple(aliases)


def patient_aliases(subject: Mapping[str, Any], path: str, bundle: BundleIdentities) -> tuple[str, ...]:
    """The aliases a subject Reference names; Invalid when it names none we can use."""
    aliases: list[str] = []
    ref = subject.get("reference")
    if isinstance(ref, str) and ref:
        aliases += _from_reference(ref.split("/_history/")[0], f"{path}.reference", bundle)
    ident = subject.get("identifier")
    if isinstance(ident, Mapping) and ident.get("system") and ident.get("value"):
        aliases.append(f"id:{ident['system']}|{ident['value']}")
    if not aliases:
        raise Invalid(
            [
                Issue(
                    "required",
                    "subject must name a Patient by reference or by identifier with system and value",
                    (path,),
                    status=422,
                )
            ]
        )
    return tuple(dict.fromkeys(aliases))


def _from_reference(ref: str, path: str, bundle: BundleIdentities) -> list[str]:
    if ref.startswith("urn:uuid:") or ref.startswith("urn:oid:"):
        if ref not in bundle:
            raise Invalid(
                [Issue("not-found", f"{ref} names no Patient entry of this Bundle", (path,), status=400)]
            )
        found = bundle[ref]
        if not found:
            raise Invalid(
                [
                    Issue(
                        "required",
                        f"the Patient entry {ref} carries no id or identifier, so the patient could "
                        "not be recognised again",
                        (path,),
                        status=422,
                    )
                ]
            )
        return list(found)
    if ref.startswith("Patient?"):
        params = parse_qsl(ref.removeprefix("Patient?"), keep_blank_values=True)
        if len(params) != 1 or params[0][0] != "identifier" or "|" not in params[0][1]:
            raise Invalid(
                [
                    Issue(
                        "not-supported",
                        "a conditional patient reference must be Patient?identifier=system|value",
                        (path,),
                    )
                ]
            )
        return [f"id:{params[0][1]}"]
    parts = ref.rstrip("/").split("/")
    if len(parts) < 2 or parts[-2] != "Patient" or not parts[-1]:
        raise Invalid([Issue("value", f"subject must be a Patient, not {ref!r}", (path,), status=422)])
    # Relative and absolute forms of one server's Patient are kept apart: lytestream cannot know
    # that two bases are one system.
    return [f"ref:{ref}"]


def urn_references(resource: Any, path: str, full_urls: set[str]) -> list[Issue]:
    """Issues for references to urn:uuid/urn:oid that no entry of the Bundle carries."""
    issues: list[Issue] = []

    def visit(node: Any, at: str) -> None:
        if isinstance(node, dict):
            for key, value in node.items():
                if key == "reference" and isinstance(value, str) and value.startswith("urn:"):
                    if value not in full_urls:
                        issues.append(
                            Issue("not-found", f"{value} names no entry of this Bundle", (f"{at}.reference",))
                        )
                elif isinstance(value, (dict, list)):
                    visit(value, f"{at}.{key}")
        elif isinstance(node, list):
            for i, item in enumerate(node):
                visit(item, f"{at}[{i}]")

    visit(resource, path)
    return issues
