"""Which medication codings count as insulin. The code lists are site policy."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

__all__ = ["ATC_SYSTEM", "RXNORM_SYSTEM", "InsulinCodes"]

ATC_SYSTEM = "http://www.whocc.no/atc"
RXNORM_SYSTEM = "http://www.nlm.nih.gov/research/umls/rxnorm"


@dataclass(frozen=True, slots=True)
class InsulinCodes:
    """ATC code prefixes (A10A = insulins and analogues) and single codes in other systems."""

    atc_prefixes: tuple[str, ...] = ("A10A",)
    codes: frozenset[str] = frozenset()  # "system|code"

    def match(self, codings: Iterable[Mapping[str, Any]]) -> str | None:
        """The first coding that counts as insulin, as "system|code", or None."""
        for coding in codings:
            system, code = coding.get("system"), coding.get("code")
            if not isinstance(system, str) or not isinstance(code, str):
                continue
            if system == ATC_SYSTEM and code.startswith(self.atc_prefixes):
                return f"{system}|{code}"
            if f"{system}|{code}" in self.codes:
                return f"{system}|{code}"
        return None
