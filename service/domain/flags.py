"""The flag lifecycle as a pure function: current findings + open flags -> changes to make.

One active flag per (patient, rule, episode). A finding with no open flag creates one; a finding
whose evidence, numbers, sentence, priority or encounter differ from its open flag updates it (a new
version); an open flag with no finding closes (inactive, period end), unless every result it rested
on has been withdrawn, when it is withdrawn (entered-in-error). No FHIR JSON here: the renderer
turns each change into a Flag version. Decision support only.

Pass the open flags of exactly the patients whose findings are passed: an open flag of a patient
not evaluated would be closed.
"""

from __future__ import annotations

from collections.abc import Collection, Iterable, Mapping
from dataclasses import dataclass
from datetime import datetime
from types import MappingProxyType

from service.domain.findings import Finding, Priority, Rule

__all__ = ["CloseFlag", "CreateFlag", "FlagChange", "OpenFlag", "UpdateFlag", "WithdrawFlag", "reconcile"]


@dataclass(frozen=True, slots=True)
class OpenFlag:
    """An active flag as stored: what the flag layer knows of it."""

    id: str
    patient: str
    rule: Rule
    episode: str
    evidence: tuple[str, ...]
    numbers: Mapping[str, float]
    sentence: str
    priority: Priority
    period_start: datetime
    encounter: str | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "evidence", tuple(sorted(set(self.evidence))))
        object.__setattr__(self, "numbers", MappingProxyType(dict(sorted(self.numbers.items()))))

    @property
    def key(self) -> tuple[str, Rule, str]:
        return (self.patient, self.rule, self.episode)


@dataclass(frozen=True, slots=True)
class CreateFlag:
    """Raise a new active flag; its period starts at the finding's onset (a data time)."""

    finding: Finding


@dataclass(frozen=True, slots=True)
class UpdateFlag:
    """Write a new version of an open flag carrying the finding's evidence and numbers."""

    flag: OpenFlag
    finding: Finding


@dataclass(frozen=True, slots=True)
class CloseFlag:
    """Make the flag inactive with period end ``end``."""

    flag: OpenFlag
    end: datetime


@dataclass(frozen=True, slots=True)
class WithdrawFlag:
    """Mark the flag entered-in-error: everything it rested on was withdrawn."""

    flag: OpenFlag
    at: datetime


FlagChange = CreateFlag | UpdateFlag | CloseFlag | WithdrawFlag


def reconcile(
    findings: Iterable[Finding],
    open_flags: Iterable[OpenFlag],
    withdrawn: Collection[str],
    now: datetime,
) -> list[FlagChange]:
    """The changes that bring the open flags in line with the findings, in a stable order.

    ``withdrawn`` holds references ("Observation/a/_history/2", "Observation/a",
    "MedicationAdministration/m") or bare observation ids of records entered in error. ``now`` is
    the period end of a closed flag and the time of a withdrawal; it is never an onset.
    """
    by_key: dict[tuple[str, Rule, str], Finding] = {}
    for finding in findings:
        by_key[(finding.patient, finding.rule, finding.episode)] = finding
    flags: dict[tuple[str, Rule, str], OpenFlag] = {}
    for flag in sorted(open_flags, key=lambda f: (f.key, f.id)):
        # Two open flags for one episode should not exist; the later id is closed as the duplicate.
        flags.setdefault(flag.key, flag)

    changes: list[tuple[tuple[str, str, str, int], FlagChange]] = []
    carried: set[str] = set()  # open flags that continue under a re-keyed episode
    for key, finding in by_key.items():
        current = flags.get(key)
        if current is None:
            current = _same_episode_rekeyed(finding, flags, by_key, carried)
            if current is None:
                changes.append((_order(key, 0), CreateFlag(finding)))
                continue
            carried.add(current.id)
        if _differs(current, finding) or current.episode != finding.episode:
            changes.append((_order(key, 1), UpdateFlag(current, finding)))
    for flag in sorted(open_flags, key=lambda f: (f.key, f.id)):
        if (flag.key in by_key and flags[flag.key] is flag) or flag.id in carried:
            continue
        if _rested_only_on_withdrawn(flag, withdrawn):
            changes.append((_order(flag.key, 2), WithdrawFlag(flag, now)))
        else:
            changes.append((_order(flag.key, 3), CloseFlag(flag, now)))
    changes.sort(key=lambda item: (item[0], _flag_id(item[1])))
    return [change for _, change in changes]


def _same_episode_rekeyed(
    finding: Finding,
    flags: Mapping[tuple[str, Rule, str], OpenFlag],
    by_key: Mapping[tuple[str, Rule, str], Finding],
    carried: set[str],
) -> OpenFlag | None:
    """An open flag of the same patient and rule, with no finding of its own, that shares a result
    with this finding: the same episode, whose onset moved because an earlier result arrived late.
    It continues as a new version rather than closing and reopening (one page, not two)."""
    cited = {_versionless(ref) for ref in finding.evidence}
    for key, flag in sorted(flags.items(), key=lambda item: item[1].id):
        if (key[0], key[1]) != (finding.patient, finding.rule) or key in by_key or flag.id in carried:
            continue
        if cited & {_versionless(ref) for ref in flag.evidence}:
            return flag
    return None


def _versionless(reference: str) -> str:
    return reference.split("/_history/")[0]


def _order(key: tuple[str, Rule, str], kind: int) -> tuple[str, str, str, int]:
    return (key[0], key[1].value, key[2], kind)


def _flag_id(change: FlagChange) -> str:
    return "" if isinstance(change, CreateFlag) else change.flag.id


def _differs(flag: OpenFlag, finding: Finding) -> bool:
    return (
        flag.evidence != finding.evidence
        or dict(flag.numbers) != dict(finding.numbers)
        or flag.sentence != finding.sentence
        or flag.priority != finding.priority
        or flag.encounter != finding.encounter
    )


def _rested_only_on_withdrawn(flag: OpenFlag, withdrawn: Collection[str]) -> bool:
    """Every Observation the flag cites is withdrawn, or every MedicationAdministration it cites is
    (the insulin that made the potassium matter was never given)."""
    observations = [ref for ref in flag.evidence if ref.startswith("Observation/")]
    medications = [ref for ref in flag.evidence if ref.startswith("MedicationAdministration/")]
    if observations and all(_is_withdrawn(ref, withdrawn) for ref in observations):
        return True
    return bool(medications) and all(_is_withdrawn(ref, withdrawn) for ref in medications)


def _is_withdrawn(reference: str, withdrawn: Collection[str]) -> bool:
    parts = reference.split("/")
    versionless = "/".join(parts[:2])
    if reference in withdrawn or versionless in withdrawn:
        return True
    return parts[0] == "Observation" and len(parts) > 1 and parts[1] in withdrawn
