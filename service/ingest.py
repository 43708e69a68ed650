"""The ingest pipeline: request entries → triage → validate → normalise → store, in FHIR's units of work.

A ``transaction`` Bundle is all-or-nothing: every entry is prepared first and any issue rejects
the whole Bundle before the database is touched. A ``batch`` Bundle commits its good entries and
reports each bad one. Both commit before the response is sent, together with any re-evaluation
that the ``on_change`` hook does for the patients touched (so a 2xx means all of it is durable).
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import datetime, timedelta
from typing import Any
from urllib.parse import parse_qsl

import orjson
from sqlalchemy.exc import IntegrityError
from sqlmodel import Session

from service.clock import Clock
from service.config import Settings
from service.db.audit import record_audit
from service.db.engine import Database
from service.db.patients import IdentityConflict, resolve_patients
from service.db.resources import Pending, Written, apply_versions, record_request
from service.domain.insulin import InsulinCodes
from service.domain.values import InsulinExposure, LabResult, ResultStatus
from service.domain.versions import Decision
from service.errors import Issue, RequestRejected
from service.fhir.audit_render import AuditFacts, Requester
from service.fhir.collection_time import check_not_future
from service.fhir.datetimes import OFFSETLESS_JSON, fix_offsetless
from service.fhir.limits import overlong_strings
from service.fhir.normalise import (
    IncomingInsulin,
    IncomingObservation,
    Invalid,
    normalise_insulin,
    normalise_observation,
    normalise_patient,
)
from service.fhir.references import BundleIdentities, patient_aliases, patient_entry_aliases, urn_references
from service.fhir.triage import Kind, triage
from service.fhir.validate import validate_resource

__all__ = ["EntryRequest", "EntryResult", "Ingestor", "OnChange", "OnStored"]

# Called inside the unit of work with the patients whose data changed, before it commits.
OnChange = Callable[[Session, set[str], datetime], object]
# Called after OnChange with each version just written (by entry slot); returns notes for those entries,
# so that a result stored but not judged is never answered as "all ok" (service.arrivals).
OnStored = Callable[[Session, Mapping[int, LabResult | InsulinExposure], datetime], Mapping[int, Sequence[Issue]]]

_STORED_TYPES = ("Observation", "MedicationAdministration")


@dataclass
class EntryRequest:
    """One resource to take in: a Bundle entry, or the body of a single POST/PUT."""

    root: str  # FHIRPath of the resource, e.g. "Bundle.entry[3].resource" or "Observation"
    resource: Any
    method: str = "POST"
    url: str | None = None
    if_none_exist: str | None = None
    full_url: str | None = None
    refused: Issue | None = None  # the caller's scopes do not cover this entry
    # The caller may create but not update: the Issue to report if this entry would change a held resource.
    update_refused: Issue | None = None


@dataclass
class EntryResult:
    status: int
    location: str | None = None
    version_id: int | None = None
    last_modified: datetime | None = None
    issues: list[Issue] = field(default_factory=list)
    body: bytes | None = None  # the resource as now served, for Prefer: return=representation
    suspect_drop: bool = False  # not stored, though it looks like a watched result sent under a wrong code


@dataclass
class _Prepared:
    kind: Kind
    warnings: list[Issue]
    aliases: tuple[str, ...] = ()
    observation: IncomingObservation | None = None
    insulin: IncomingInsulin | None = None
    reason: str = ""
    suspect: bool = False
    if_none_exist: bool = False
    update_refused: Issue | None = None
    root: str = ""  # FHIRPath of the resource, for notes on the stored entry


class Ingestor:
    """Takes FHIR writes into the store. One per process; safe to share across threads."""

    def __init__(
        self,
        *,
        db: Database,
        settings: Settings,
        insulin: InsulinCodes,
        clock: Clock,
        on_change: OnChange | None = None,
        on_stored: OnStored | None = None,
        future_tolerance: timedelta = timedelta(0),
    ) -> None:
        self.db = db
        self.settings = settings
        self.insulin = insulin
        self.clock = clock
        self.on_change = on_change
        self.on_stored = on_stored
        self.future_tolerance = future_tolerance  # policy [timing]; none by default: refuse any future time

    # -- units of work -------------------------------------------------------------------

    def single(self, entry: EntryRequest, *, raw: bytes, interaction: str,
               requester: Requester | None = None) -> EntryResult:
        """A single create or conditional update; RequestRejected if it cannot be taken."""
        try:
            prepared = self._prepare(entry, {}, set(), long_strings=self._may_hold_long_strings(raw))

            def work(session: Session) -> EntryResult:
                results = self._store(session, [prepared], raw=raw, interaction=interaction)
                self._audit(session, requester, interaction, results)
                return results[0]

            return self.db.unit_of_work(work)
        except Invalid as exc:
            self._audit_refusal(requester, interaction, 1)
            raise RequestRejected(exc.issues) from exc

    def transaction(self, entries: Sequence[EntryRequest], *, raw: bytes,
                    requester: Requester | None = None) -> list[EntryResult]:
        """All entries or none: RequestRejected lists every issue found, nothing is written."""
        identities, full_urls = self._bundle_identities(entries)
        long_strings = self._may_hold_long_strings(raw)
        prepared: list[_Prepared] = []
        issues: list[Issue] = []
        for e in entries:
            try:
                prepared.append(self._prepare(e, identities, full_urls, long_strings=long_strings))
            except Invalid as exc:
                issues += exc.issues
        issues += _duplicate_identities(entries, prepared) if not issues else []
        try:
            if issues:
                raise Invalid(issues)

            def work(session: Session) -> list[EntryResult]:
                results = self._store(session, prepared, raw=raw, interaction="transaction")
                self._audit(session, requester, "transaction", results)
                return results

            return self.db.unit_of_work(work)
        except Invalid as exc:
            self._audit_refusal(requester, "transaction", len(entries))
            raise RequestRejected(exc.issues) from exc

    def batch(self, entries: Sequence[EntryRequest], *, raw: bytes,
              requester: Requester | None = None) -> list[EntryResult]:
        """Each entry on its own: a bad one is reported in its slot and the others are kept."""
        identities, full_urls = self._bundle_identities(entries)
        long_strings = self._may_hold_long_strings(raw)
        refused: list[EntryResult | None] = [None] * len(entries)
        good: list[tuple[int, _Prepared]] = []
        for i, e in enumerate(entries):
            try:
                good.append((i, self._prepare(e, identities, full_urls, long_strings=long_strings)))
            except Invalid as exc:
                refused[i] = _failed(exc.issues)

        def work(session: Session) -> list[EntryResult]:
            results = list(refused)  # afresh on each attempt
            try:
                with session.begin_nested():
                    stored = self._store(session, [p for _, p in good], raw=raw, interaction="batch")
                for (i, _), r in zip(good, stored, strict=True):
                    results[i] = r
            except (Invalid, IntegrityError):
                # Rare: an identity conflict or a race on a unique key. Retry one by one so only
                # the offending entries fail.
                for i, p in good:
                    try:
                        with session.begin_nested():
                            results[i] = self._store(session, [p], raw=raw, interaction="batch")[0]
                    except Invalid as exc:
                        results[i] = _failed(exc.issues)
                    except IntegrityError:
                        results[i] = _failed(
                            [Issue("conflict", "another request changed this resource at the same time; "
                                   "send it again", (entries[i].root,), status=409)]
                        )
            done = [r for r in results if r is not None]
            self._audit(session, requester, "batch", done)
            return done

        return self.db.unit_of_work(work)

    # -- audit -----------------------------------------------------------------------------

    def _audit(self, session: Session, requester: Requester | None, interaction: str,
               results: Sequence[EntryResult]) -> None:
        """One AuditEvent per request, in its unit of work: who sent it and the counts, no patient data."""
        if requester is None:
            return
        counts = Counter(str(r.status) for r in results)
        details = {f"status-{k}": str(v) for k, v in counts.items()} | {"entries": str(len(results))}
        facts = AuditFacts(subtype=interaction, recorded=self.clock.now(), requester=requester, details=details,
                           outcome="0" if all(r.status < 400 for r in results) else "4")
        events = [(facts, None)]
        suspect = sum(r.suspect_drop for r in results)
        if suspect:
            # Its own event, so that the summary counts such drops per client without reading every
            # ingest event: the sender's mapping needs fixing.
            events.append((AuditFacts(subtype="dropped-code", recorded=facts.recorded, requester=requester,
                                      outcome="4", outcome_desc="results under a likely mistyped code were not stored",
                                      details={"dropped": str(suspect)}), None))
        record_audit(session=session, events=events, base_url=self.settings.base_url)

    def _audit_refusal(self, requester: Requester | None, interaction: str, entries: int) -> None:
        if requester is None:
            return
        facts = AuditFacts(subtype=interaction, recorded=self.clock.now(), requester=requester, outcome="4",
                           details={"entries": str(entries), "refused": "true"})
        with self.db.session(write=True) as session:
            record_audit(session=session, events=[(facts, None)], base_url=self.settings.base_url)

    # -- preparing (no database) ---------------------------------------------------------

    def _bundle_identities(self, entries: Sequence[EntryRequest]) -> tuple[BundleIdentities, set[str]]:
        identities: dict[str, tuple[str, ...]] = {}
        full_urls: set[str] = set()
        for e in entries:
            if e.full_url:
                full_urls.add(e.full_url)
            if e.full_url and isinstance(e.resource, dict) and e.resource.get("resourceType") == "Patient":
                identities[e.full_url] = patient_entry_aliases(normalise_patient(e.resource, e.root), e.url)
        return identities, full_urls

    def _may_hold_long_strings(self, raw: bytes) -> bool:
        """A string cannot have more characters than the request has bytes: most requests need no look."""
        return len(raw) > self.settings.max_string_chars

    def _prepare(self, e: EntryRequest, identities: BundleIdentities, full_urls: set[str], *,
                 long_strings: bool = False) -> _Prepared:
        if e.refused is not None:
            raise Invalid([e.refused])
        resource = e.resource
        if not isinstance(resource, dict):
            raise Invalid([Issue("structure", "a resource (JSON object) is required", (e.root,))])
        if long_strings:
            # Before triage: the limit holds for resources that are dropped unvalidated too.
            overlong = overlong_strings(resource, e.root, self.settings.max_string_chars)
            if overlong:
                raise Invalid(overlong)
        rtype = resource.get("resourceType")
        if not isinstance(rtype, str):
            raise Invalid([Issue("structure", "resourceType is missing", (f"{e.root}.resourceType",))])
        if_none_exist = _check_request(e, rtype)
        found = triage(resource, self.insulin)
        if found.kind is Kind.IGNORED:
            return _Prepared(Kind.IGNORED, [], reason=found.reason, suspect=found.suspect, root=e.root)
        # One cheap serialisation tells whether the two tree walks below can find anything at all.
        blob = orjson.dumps(resource)
        warnings = (fix_offsetless(resource, e.root, self.settings.lab_timezone,
                                   on_transition=self.settings.lab_timezone_transitions)
                    if OFFSETLESS_JSON.search(blob) else [])
        errors = [w for w in warnings if w.severity == "error"]
        # The models would repeat each offset error less clearly; keep ours.
        seen = {x for w in errors for x in w.expression}
        errors += [i for i in validate_resource(resource, e.root) if not seen.intersection(i.expression)]
        if b'"urn:' in blob:
            errors += urn_references(resource, e.root, full_urls)
        if errors:
            raise Invalid(errors)
        warnings = [w for w in warnings if w.severity != "error"]
        if found.kind is Kind.PATIENT:
            aliases = patient_entry_aliases(normalise_patient(resource, e.root), e.url)
            return _Prepared(Kind.PATIENT, warnings, aliases=aliases)
        if found.kind is Kind.OBSERVATION and found.entry is None:
            # Triage could not read Observation.code and the models found it well formed: a code of text
            # alone (valid, but not one we watch) or an empty one (ele-1: an element has a value or children).
            code = resource.get("code")
            if not code:
                raise Invalid([Issue("required", "Observation.code must carry a coding or text (ele-1)",
                                     (f"{e.root}.code",))])
            return _Prepared(Kind.IGNORED, [], reason="Observation code carries no coding lytestream watches; "
                             "not stored")
        if found.kind is Kind.OBSERVATION:
            assert found.entry is not None
            obs = normalise_observation(resource, found.entry, e.root)
            obs = replace(obs, identifier=_check_identifier(e, obs.identifier, if_none_exist))
            check_not_future(obs, e.root, now=self.clock.now(), tolerance=self.future_tolerance)
            aliases = patient_aliases(obs.subject, f"{e.root}.subject", identities)
            return _Prepared(Kind.OBSERVATION, warnings, aliases, observation=obs,
                             if_none_exist=if_none_exist is not None, update_refused=e.update_refused,
                             root=e.root)
        ins = normalise_insulin(resource, self.insulin, e.root)
        assert ins is not None  # triage saw an insulin coding
        ins = replace(ins, identifier=_check_identifier(e, ins.identifier, if_none_exist))
        check_not_future(ins, e.root, now=self.clock.now(), tolerance=self.future_tolerance)
        aliases = patient_aliases(ins.subject, f"{e.root}.subject", identities)
        return _Prepared(Kind.INSULIN, warnings, aliases, insulin=ins, if_none_exist=if_none_exist is not None,
                         update_refused=e.update_refused, root=e.root)

    # -- storing (inside the unit of work) -----------------------------------------------

    def _store(self, session: Session, prepared: Sequence[_Prepared], *, raw: bytes, interaction: str
               ) -> list[EntryResult]:
        now = self.clock.now()
        with_identity = [i for i, p in enumerate(prepared) if p.aliases]
        try:
            keys = resolve_patients(session=session, groups=[prepared[i].aliases for i in with_identity])
        except IdentityConflict as exc:
            raise Invalid(
                [Issue("conflict", f"these names of the patient already belong to different patients: "
                       f"{', '.join(a.split(':', 1)[0] for a in exc.aliases)} (values withheld)",
                       (), status=409)]
            ) from exc
        key_of = dict(zip(with_identity, keys, strict=True))
        self.db.lock_patients(session, keys)

        pending: list[Pending] = []
        slot: dict[int, int] = {}
        for i, p in enumerate(prepared):
            if p.observation is not None:
                slot[i] = len(pending)
                pending.append(_observation_pending(p, key_of[i]))
            elif p.insulin is not None:
                slot[i] = len(pending)
                pending.append(_insulin_pending(p, key_of[i], now))
        request_id: list[int] = []

        def make_request_id() -> int:
            request_id.append(record_request(session=session, interaction=interaction, body=raw, now=now))
            return request_id[0]

        written = apply_versions(session=session, pending=pending, now=now, request_id=make_request_id)
        # Decided only now, against what is held: raising rolls back what apply_versions wrote.
        refused = [p.update_refused for i, p in enumerate(prepared)
                   if p.update_refused is not None and i in slot and _changes_held(written[slot[i]], p)]
        if refused:
            raise Invalid(refused)

        touched: set[str] = set()
        stored: dict[int, LabResult | InsulinExposure] = {}
        results: list[EntryResult] = []
        for i, p in enumerate(prepared):
            if i in slot:
                w = written[slot[i]]
                if w.decision in (Decision.CREATE, Decision.UPDATE):
                    touched.add(key_of[i])
                    stored[i] = _stored_value(p, w, pending[slot[i]].row, key_of[i], now)
                    if w.previous_patient:
                        touched.add(w.previous_patient)
                rtype = pending[slot[i]].resource_type
                results.append(_result(rtype, w, p.warnings))
            elif p.kind is Kind.PATIENT:
                results.append(EntryResult(200, issues=[*p.warnings, Issue(
                    "informational", "patient identity recorded; lytestream keeps identifiers only",
                    severity="information")]))
            elif p.suspect:
                # Dropped like any unwatched code, but said as a warning and counted: a feed sending
                # sodium under a typo would otherwise lose every sodium in silence.
                results.append(EntryResult(200, issues=[Issue("code-invalid", p.reason, (f"{p.root}.code",),
                                                              severity="warning")], suspect_drop=True))
            else:
                results.append(EntryResult(200, issues=[Issue("informational", p.reason, severity="information")]))
        if touched and self.on_change is not None:
            self.on_change(session, touched, now)
        if stored and self.on_stored is not None:
            _add_notes(results, prepared, self.on_stored(session, stored, now))
        return results


def _changes_held(w: Written, p: _Prepared) -> bool:
    """Whether this write changes a resource already held: a new version, or a result that replaces another
    (observation-replaces takes the named result out of the rules, whichever of the two arrives first)."""
    replaces = p.observation is not None and p.observation.replaces is not None
    return w.decision is Decision.UPDATE or (w.decision is Decision.CREATE and replaces)
def _stored_value(p: _Prepared, w: Written, row: Mapping[str, Any], patient_key: str, now: datetime
                  ) -> LabResult | InsulinExposure:
    """The version just written, as the rules would read it (the row as stored: its end, its quality)."""
    if p.observation is not None:
        o = p.observation
        return LabResult(
            observation_id=w.id, version=w.version_id, patient=patient_key, analyte=o.entry.analyte,
            specimen=o.entry.specimen, loinc=o.entry.code, status=ResultStatus(o.status), effective=o.effective,
            value=o.value, comparator=o.comparator, calculated=o.entry.calculated, issued=o.issued,
            encounter=o.encounter, key=f"{o.identifier[0]}|{o.identifier[1]}", quality=row.get("quality"),
            arrived=now, sent_value=o.sent_value, sent_unit=o.sent_unit,
        )
    x = p.insulin
    assert x is not None
    return InsulinExposure(source_id=w.id, version=w.version_id, patient=patient_key, start=x.start,
                           end=row.get("end"), route=x.route, status=x.status, medication=x.medication)


def _add_notes(results: list[EntryResult], prepared: Sequence[_Prepared],
               notes: Mapping[int, Sequence[Issue]]) -> None:
    for i, issues in notes.items():
        results[i].issues.extend(replace(n, expression=n.expression or (prepared[i].root,)) for n in issues)


def _failed(issues: list[Issue]) -> EntryResult:
    return EntryResult(RequestRejected(issues).status, issues=issues)


def _result(rtype: str, w: Written, warnings: list[Issue]) -> EntryResult:
    issues = list(warnings)
    if w.decision is Decision.STALE:
        issues.append(Issue("informational", "not applied: the version held supersedes this one "
                            "(a preliminary never replaces a final; entered-in-error is final)",
                            severity="warning"))
    elif w.decision is Decision.EXISTS:
        issues.append(Issue("informational", "a resource with this identifier exists; the create was ignored",
                            severity="information"))
    elif w.decision is Decision.UNCHANGED:
        issues.append(Issue("informational", "identical to the version held; nothing changed",
                            severity="information"))
    return EntryResult(
        201 if w.decision is Decision.CREATE else 200,
        location=f"{rtype}/{w.id}/_history/{w.version_id}",
        version_id=w.version_id,
        last_modified=w.last_updated,
        issues=issues,
        body=w.resource or None,
    )


def _subject_text(subject: dict[str, Any]) -> str:
    if subject.get("reference"):
        return str(subject["reference"])
    ident = subject.get("identifier") or {}
    return f"identifier:{ident.get('system')}|{ident.get('value')}"


def _observation_pending(p: _Prepared, patient_key: str) -> Pending:
    o = p.observation
    assert o is not None
    return Pending(
        resource_type="Observation",
        identifier=o.identifier,
        status=o.status,
        issued=o.issued,
        content_hash=o.content_hash,
        resource=o.resource,
        if_none_exist=p.if_none_exist,
        row={
            "patient_key": patient_key,
            "subject_reference": _subject_text(o.subject),
            "loinc": o.entry.code,
            "analyte": o.entry.analyte.value,
            "specimen": o.entry.specimen.value,
            "calculated": o.entry.calculated,
            "status": o.status,
            "value": o.value,
            "comparator": o.comparator,
            "effective": o.effective,
            "issued": o.issued,
            "encounter": o.encounter,
            "replaces": o.replaces,
            "quality": o.quality,
            "sent_value": o.sent_value,
            "sent_unit": o.sent_unit,
        },
    )


# An administration in these states has ended; without an end time it ended when the news came.
_ENDED = ("stopped", "completed", "on-hold")


def _insulin_pending(p: _Prepared, patient_key: str, now: datetime) -> Pending:
    x = p.insulin
    assert x is not None
    # A stopped or completed infusion sent without effectivePeriod.end would otherwise count as
    # running forever; the time its status arrived is the latest it can have ended.
    end = x.end if x.end is not None or x.status not in _ENDED else max(now, x.start)
    return Pending(
        resource_type="MedicationAdministration",
        identifier=x.identifier,
        status=x.status,
        issued=None,
        content_hash=x.content_hash,
        resource=x.resource,
        if_none_exist=p.if_none_exist,
        row={
            "patient_key": patient_key,
            "subject_reference": _subject_text(x.subject),
            "status": x.status,
            "medication": x.medication,
            "route": x.route,
            "start": x.start,
            "end": end,
        },
    )


def _identifier_query(query: str, path: str) -> tuple[str, str]:
    params = parse_qsl(query, keep_blank_values=True)
    if len(params) != 1 or params[0][0] != "identifier" or "|" not in params[0][1]:
        raise Invalid([Issue("not-supported", "only identifier=system|value is supported as a condition", (path,))])
    system, value = params[0][1].split("|", 1)
    return system, value


def _check_request(e: EntryRequest, rtype: str) -> tuple[str, str] | None:
    """Checks the entry's request against its resource; returns the If-None-Exist identifier."""
    method = e.method.upper()
    url = e.url
    if rtype not in (*_STORED_TYPES, "Patient") and method in ("POST", "PUT"):
        return None  # acknowledged and dropped by triage whatever the request says
    if method == "POST":
        if url not in (None, rtype):
            raise Invalid([Issue("value", f"POST url must be {rtype!r} for a {rtype}", (_req(e, "url"),))])
        if e.if_none_exist:
            return _identifier_query(e.if_none_exist, _req(e, "ifNoneExist"))
        return None
    if method == "PUT":
        if rtype == "Patient":
            return None
        if url and url.startswith(f"{rtype}?"):
            return None
        raise Invalid([Issue("not-supported", f"lytestream assigns ids: update a {rtype} by "
                             f"PUT {rtype}?identifier=system|value", (_req(e, "url"),))])
    raise Invalid([Issue("not-supported", f"method {e.method} is not supported here; use POST or PUT",
                         (_req(e, "method"),))])


def _req(e: EntryRequest, element: str) -> str:
    if e.root.endswith(".resource"):
        return f"{e.root.removesuffix('.resource')}.request.{element}"
    return e.root


def _check_identifier(
    e: EntryRequest, identifier: tuple[str, str], if_none_exist: tuple[str, str] | None
) -> tuple[str, str]:
    """The business identifier: the one a condition names, else the resource's first."""
    resource = e.resource
    held = {(str(i.get("system")), str(i.get("value"))) for i in resource.get("identifier") or ()}
    if if_none_exist is not None and if_none_exist not in held:
        raise Invalid([Issue("value", "ifNoneExist must name the resource's own identifier",
                             (_req(e, "ifNoneExist"),))])
    if e.method.upper() == "PUT" and e.url and "?" in e.url:
        wanted = _identifier_query(e.url.split("?", 1)[1], _req(e, "url"))
        if wanted not in held:
            raise Invalid([Issue("value", "the conditional update names an identifier the resource does not carry",
                                 (_req(e, "url"),))])
        return wanted
    return if_none_exist or identifier


def _duplicate_identities(entries: Sequence[EntryRequest], prepared: Sequence[_Prepared]) -> list[Issue]:
    """FHIR: a resource may appear once in a transaction."""
    seen: dict[tuple[str, tuple[str, str]], int] = {}
    issues: list[Issue] = []
    for i, p in enumerate(prepared):
        inc = p.observation or p.insulin
        if inc is None:
            continue
        key = (p.kind.value, inc.identifier)
        if key in seen:
            issues.append(Issue("duplicate", f"the same resource (identifier) appears in entries {seen[key]} and {i}",
                                (entries[i].root,)))
        seen.setdefault(key, i)
    return issues
