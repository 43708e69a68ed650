"""Fill a fresh store with historical results fast, straight into the tables (no HTTP, no validation).

Rows are what the service itself would have written for the same resources: the service's own
normaliser derives the columns and its own ``served`` renders the stored version, so the store is
realistic (indexes, row sizes, patients with long histories) without paying for ingest.
"""

from __future__ import annotations

import random
import uuid
from collections.abc import Iterable, Iterator
from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import Engine, create_engine, event, func, insert, select, text

from bench.feeds import ALL_RELEVANT, FEED_START, draws
from service.db.engine import Database
from service.db.resources import served
from service.db.tables import FhirVersion, ObservationRecord, PatientAlias
from service.domain.catalogue import lookup
from service.fhir.normalise import normalise_observation

__all__ = ["count_observations", "prefill_store"]

_OBS = ObservationRecord.__table__  # type: ignore[attr-defined]
_VERSIONS = FhirVersion.__table__  # type: ignore[attr-defined]
_ALIAS = PatientAlias.__table__  # type: ignore[attr-defined]
_CHUNK = 20_000
HISTORY_DAYS = 90.0


def _bulk_engine(url: str) -> Engine:
    """An engine for loading only: durability is pointless for a store built to be thrown away."""
    engine = create_engine(url, hide_parameters=True)

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection: Any, _record: Any) -> None:
        cur = dbapi_connection.cursor()
        cur.execute("PRAGMA synchronous=OFF")
        cur.execute("PRAGMA cache_size=-262144")  # 256 MiB of page cache while loading
        cur.close()

    return engine


def _rows(resources: Iterable[dict[str, Any]], keys: dict[int, str], rng: random.Random
          ) -> Iterator[tuple[dict[str, Any], dict[str, Any]]]:
    """(observation row, fhir_version row) for each historical resource."""
    for resource in resources:
        entry = lookup(resource["code"]["coding"][0]["code"])
        assert entry is not None  # history holds watched analytes only
        obs = normalise_observation(resource, entry, "Observation")
        rid = str(uuid.UUID(int=rng.getrandbits(128), version=4))
        # Received a little after the lab issued it, as the feed would have delivered it.
        received = (obs.issued or obs.effective) + timedelta(seconds=rng.randint(5, 300))
        patient = int(resource["subject"]["reference"].split("/")[1])
        yield (
            {
                "id": rid, "identifier_system": obs.identifier[0], "identifier_value": obs.identifier[1],
                "patient_key": keys[patient], "subject_reference": resource["subject"]["reference"],
                "loinc": entry.code, "analyte": entry.analyte.value, "specimen": entry.specimen.value,
                "calculated": entry.calculated, "status": obs.status, "value": obs.value,
                "comparator": obs.comparator, "effective": obs.effective, "issued": obs.issued,
                "encounter": obs.encounter, "replaces": obs.replaces, "version_id": 1,
                "last_updated": received, "content_hash": obs.content_hash,
            },
            {
                "resource_type": "Observation", "id": rid, "version_id": 1, "last_updated": received,
                "request_id": None, "resource": served(resource, rid, 1, received),
            },
        )


def prefill_store(url: str, *, stored: int, patients: int, seed: int) -> int:
    """Create the schema at ``url`` and load ``stored`` results over ``patients`` patients.

    History ends where the benchmark feeds begin, so feed results land on patients that already
    have months of results (their aliases exist, their index ranges are populated).
    Returns the number of observation rows loaded.
    """
    db = Database(url)
    db.create_schema()
    db.dispose()
    rng = random.Random(seed)
    keys = {n: uuid.UUID(int=rng.getrandbits(128), version=4).hex for n in range(1, patients + 1)}
    start: datetime = FEED_START - timedelta(days=HISTORY_DAYS)
    resources = draws(ALL_RELEVANT, count=stored // len(ALL_RELEVANT), patients=patients,
                      start=start, days=HISTORY_DAYS - 1.0, prefix="hist", rng=rng)
    engine = _bulk_engine(url)
    try:
        with engine.begin() as conn:
            conn.execute(insert(_ALIAS), [{"alias": f"ref:Patient/{n}", "patient_key": k} for n, k in keys.items()])
            obs_rows: list[dict[str, Any]] = []
            ver_rows: list[dict[str, Any]] = []
            for obs_row, ver_row in _rows(resources, keys, rng):
                obs_rows.append(obs_row)
                ver_rows.append(ver_row)
                if len(obs_rows) >= _CHUNK:
                    conn.execute(insert(_OBS), obs_rows)
                    conn.execute(insert(_VERSIONS), ver_rows)
                    obs_rows, ver_rows = [], []
            if obs_rows:
                conn.execute(insert(_OBS), obs_rows)
                conn.execute(insert(_VERSIONS), ver_rows)
        with engine.connect() as conn:
            # No ANALYZE: the service never runs it, so its planner works without statistics here too.
            conn.execute(text("PRAGMA wal_checkpoint(TRUNCATE)"))
        return count_observations(engine)
    finally:
        engine.dispose()


def count_observations(engine_or_url: Engine | str) -> int:
    """Rows in the observation table: what the store actually holds."""
    engine = create_engine(engine_or_url, hide_parameters=True) if isinstance(engine_or_url, str) else engine_or_url
    try:
        with engine.connect() as conn:
            return int(conn.execute(select(func.count()).select_from(_OBS)).scalar_one())
    finally:
        if isinstance(engine_or_url, str):
            engine.dispose()
