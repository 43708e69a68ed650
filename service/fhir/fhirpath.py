"""FHIRPath for the elements an OperationOutcome names (https://hl7.org/fhirpath/N1/#identifiers).

An element name that is not a plain identifier (an unknown element sent as ``"foo bar"``) is written
as a delimited identifier in backticks, so that every expression stays valid FHIRPath.
"""

from __future__ import annotations

import re

__all__ = ["step"]

_IDENTIFIER = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


def step(path: str, name: str) -> str:
    """``path`` followed by the child element ``name``."""
    if _IDENTIFIER.match(name):
        return f"{path}.{name}"
    return f"{path}.`{name.replace(chr(92), chr(92) * 2).replace('`', chr(92) + '`')}`"
