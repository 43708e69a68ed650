"""Read a store directly, as a comparison between two stores needs: what identifies a Flag apart from
the ids and times each store assigns itself."""

from __future__ import annotations

from typing import Any

import orjson
from sqlalchemy import create_engine, text

__all__ = ["FlagSignature", "flag_signatures", "result_identifiers"]

# (patient reference, rule, status, priority, evidence as identifier/_history/version, sentence)
FlagSignature = tuple[str, str, str, str, tuple[str, ...], str]


def _rows(database_url: str, sql: str) -> list[Any]:
    engine = create_engine(database_url)
    try:
        with engine.connect() as conn:
            return list(conn.execute(text(sql)))
    finally:
        engine.dispose()


def flag_signatures(database_url: str) -> list[FlagSignature]:
    """Every Flag of the store, sorted, with patients named by their reference and evidence by the
    sender's identifiers (the resource ids are each store's own)."""
    patients: dict[str, str] = {}
    for alias, key in _rows(database_url, "SELECT alias, patient_key FROM patient_alias WHERE alias LIKE 'ref:%'"):
        patients[key] = alias.removeprefix("ref:")
    idents = {f"Observation/{rid}": value for rid, value in
              _rows(database_url, "SELECT id, identifier_value FROM observation")}
    idents |= {f"MedicationAdministration/{rid}": value for rid, value in
               _rows(database_url, "SELECT id, identifier_value FROM insulin_administration")}

    def evidence(raw: str) -> tuple[str, ...]:
        out = []
        for ref in orjson.loads(raw):
            resource, _, version = ref.partition("/_history/")
            out.append(f"{idents[resource]}/_history/{version}")
        return tuple(sorted(out))

    return sorted((patients[key], rule, status, priority, evidence(ev), sentence) for key, rule, status, priority, ev,
                  sentence in _rows(database_url,
                                    "SELECT patient_key, rule, status, priority, evidence, sentence FROM flag"))


def result_identifiers(database_url: str) -> set[str]:
    """The sender's identifiers of every stored Observation."""
    return {r[0] for r in _rows(database_url, "SELECT identifier_value FROM observation")}
