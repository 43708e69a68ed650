"""SMART clinical-data scopes, read into grants this service can check. Pure: no I/O.

Accepted (SMART App Launch 2.x, "Scopes for requesting clinical data"):

* v2 system scopes ``system/<Type|*>.<subset of cruds, in order>``, e.g. ``system/Observation.cruds``,
  ``system/Flag.rs``, ``system/*.r``;
* v1 forms, mapped as the spec says: ``.read`` → ``.rs``, ``.write`` → ``.cud``, ``.*`` → ``.cruds``.

Recognised but granting nothing (a token carrying them is still accepted for its other scopes):

* ``patient/…`` and ``user/…``. This is a system-to-system service: there is no patient in launch
  context to confine a ``patient/`` scope to, and no user whose permissions bound a ``user/`` scope.
  Reading either as ``system/`` would widen what the authorisation server granted, so we do not.
* v2 scopes with a query suffix (``system/Observation.rs?category=…``). The suffix narrows the grant to
  matching resources; we cannot enforce that per resource, and ignoring the suffix would widen the
  grant, so the whole scope grants nothing.
* undefined or out-of-order permission strings such as ``.dus`` (the spec says these MAY be ignored or
  rejected; ignoring them stops ``.read`` being misread as ``.rd``).

One scope of our own, :data:`ADMIN_SCOPE` (``lytestream/admin``), lets its holder act on Subscriptions
other clients made (with the Subscription scope for the interaction as well). It grants no clinical data
and no interaction by itself; no ``system/`` scope, however wide (``system/*.cruds``), stands in for it.

Anything else (``openid``, ``launch/patient``, ``offline_access``, ``__ext``, URLs) is not a clinical
data scope and is passed over. :func:`parse_strict` refuses every one of the above instead; it is for
scopes we issue ourselves, where a scope that grants nothing is a mistake worth stopping.
"""

from __future__ import annotations

import re
from collections.abc import Iterable
from dataclasses import dataclass

__all__ = [
    "ADMIN_SCOPE",
    "INTERACTIONS",
    "Grant",
    "ParsedScopes",
    "ScopeError",
    "allows",
    "needed_scope",
    "parse_scope",
    "parse_scopes",
    "parse_strict",
    "strict_scope_string",
]

ADMIN_SCOPE = "lytestream/admin"  # act on other clients' Subscriptions; exact match, case-sensitive
INTERACTIONS = "cruds"  # create, read, update, delete, search — the order SMART v2 requires
_V1 = {"read": "rs", "write": "cud", "*": "cruds"}
_CLINICAL = re.compile(r"^(?P<level>patient|user|system)/(?P<type>[^./?]+)\.(?P<perm>[^?]*)(?P<query>\?.*)?$")
_RESOURCE_TYPE = re.compile(r"^(?:[A-Z][A-Za-z]{0,63}|\*)$")  # FHIR type names are PascalCase letters


class ScopeError(ValueError):
    """A scope that grants nothing here, with the reason (no secrets: scopes are not secret)."""

    def __init__(self, scope: str, reason: str) -> None:
        super().__init__(f"scope {scope!r}: {reason}")
        self.scope = scope
        self.reason = reason


@dataclass(frozen=True, slots=True)
class Grant:
    """Permission for ``interactions`` (letters of ``cruds``) on ``resource_type`` (or ``*``)."""

    resource_type: str
    interactions: frozenset[str]

    def covers(self, resource_type: str, interaction: str) -> bool:
        return interaction in self.interactions and self.resource_type in ("*", resource_type)

    @property
    def scope(self) -> str:
        """The grant in v2 shortest form, e.g. ``system/Observation.rs``."""
        return f"system/{self.resource_type}.{_ordered(self.interactions)}"


@dataclass(frozen=True, slots=True)
class ParsedScopes:
    """What a scope string grants, what it held that grants nothing (scope, reason), and our admin scope."""

    grants: tuple[Grant, ...]
    ignored: tuple[tuple[str, str], ...]
    admin: bool = False


def parse_scope(scope: str) -> Grant:
    """One clinical-data scope as a grant; :class:`ScopeError` when it grants nothing here."""
    match = _CLINICAL.match(scope)
    if match is None:
        raise ScopeError(scope, "not a clinical-data scope")
    level, resource_type, perm = match["level"], match["type"], match["perm"]
    if level != "system":
        raise ScopeError(scope, f"{level}/ scopes are not honoured by a system-to-system service; "
                                "use system/")
    if match["query"] is not None:
        raise ScopeError(scope, "scopes narrowed by a query suffix are not supported")
    if not _RESOURCE_TYPE.match(resource_type):
        raise ScopeError(scope, f"{resource_type!r} is not a FHIR resource type")
    letters = _V1.get(perm, perm)
    if not letters or not _is_in_order_subset(letters):
        raise ScopeError(scope, f"{perm!r} is not a subset of 'cruds' in order, nor read/write/*")
    return Grant(resource_type, frozenset(letters))


def parse_scopes(scope_string: str) -> ParsedScopes:
    """A space-separated scope string (RFC 6749 §3.3) read leniently: unusable scopes are set aside."""
    grants: list[Grant] = []
    ignored: list[tuple[str, str]] = []
    admin = False
    for scope in scope_string.split():
        if scope == ADMIN_SCOPE:
            admin = True
            continue
        try:
            grants.append(parse_scope(scope))
        except ScopeError as exc:
            ignored.append((scope, exc.reason))
    return ParsedScopes(tuple(grants), tuple(ignored), admin)


def parse_strict(scope_string: str) -> tuple[Grant, ...]:
    """Every scope must grant something, and there must be at least one."""
    parsed = parse_scopes(scope_string)
    if parsed.ignored:
        scope, reason = parsed.ignored[0]
        raise ScopeError(scope, reason)
    if not parsed.grants:
        raise ScopeError(scope_string, "no scope given")
    return parsed.grants


def strict_scope_string(scope_string: str) -> str:
    """The scope string as we store it for a minted token: grants in v2 shortest form, then our own scope.

    Strict as :func:`parse_strict`: the admin scope alone lets its holder do nothing, so it is refused too.
    """
    grants = parse_strict(scope_string)
    own = [ADMIN_SCOPE] if parse_scopes(scope_string).admin else []
    return " ".join([g.scope for g in grants] + own)


def allows(grants: Iterable[Grant], resource_type: str, interaction: str) -> bool:
    """Whether any grant permits ``interaction`` (one of c r u d s) on ``resource_type``."""
    if len(interaction) != 1 or interaction not in INTERACTIONS:
        raise ValueError(f"interaction must be one of {' '.join(INTERACTIONS)}, not {interaction!r}")
    return any(g.covers(resource_type, interaction) for g in grants)


def needed_scope(resource_type: str, interactions: Iterable[str]) -> str:
    """The narrowest system scope covering ``interactions``: what a 403 tells the client to ask for."""
    return f"system/{resource_type}.{_ordered(frozenset(interactions))}"


def _ordered(letters: frozenset[str]) -> str:
    return "".join(c for c in INTERACTIONS if c in letters)


def _is_in_order_subset(letters: str) -> bool:
    pos = -1
    for c in letters:
        nxt = INTERACTIONS.find(c, pos + 1)
        if nxt < 0:
            return False
        pos = nxt
    return True
