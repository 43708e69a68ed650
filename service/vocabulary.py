"""The words auditors read: Flag priorities as FHIR codes (http://hl7.org/fhir/flag-priority-code) with
their display, one table for every export, summary and report."""

from __future__ import annotations

from service.domain.findings import Priority

__all__ = ["PRIORITY_DISPLAY", "priority_code", "priority_display"]

PRIORITY_DISPLAY = {"PH": "High priority", "PM": "Medium priority", "PL": "Low priority"}


def priority_code(priority: Priority | str) -> str:
    """``PH``/``PM``/``PL`` for a priority (``high``/``medium``/``low`` or already a code)."""
    text = str(priority)
    return text if text in PRIORITY_DISPLAY else Priority(text).flag_priority_code


def priority_display(priority: Priority | str) -> str:
    return PRIORITY_DISPLAY[priority_code(priority)]
