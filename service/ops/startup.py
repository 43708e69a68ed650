"""What a command that cannot start says: one line, "lytestream: <what> (<where>)", and exit code 2.

A traceback tells an operator nothing they can act on when the fault is a setting, a policy file or a
database that is not there; the line names the setting, the file and key, or the database (its URL
without the password).
"""

from __future__ import annotations

from pydantic import ValidationError
from pydantic_settings import SettingsError
from sqlalchemy.engine import make_url
from sqlalchemy.exc import DBAPIError, OperationalError

from service.auth.settings import AuthConfigError
from service.policy import PolicyError

__all__ = ["EXIT_CODE", "StartupError", "database_fault", "policy_fault", "startup_line"]

EXIT_CODE = 2


class StartupError(Exception):
    """A fault found before serving, already phrased for the operator."""

    def __init__(self, what: str, where: str) -> None:
        super().__init__(f"{what} ({where})")


def _setting(loc: tuple[int | str, ...]) -> str:
    return "LYTESTREAM_" + "__".join(str(p) for p in loc).upper() if loc else "settings"


def policy_fault(exc: PolicyError, file: object, profile: str | None) -> StartupError:
    where = f"{file or 'built-in policy'}" + (f", profile {profile}" if profile else "")
    return StartupError(f"policy refused: {_first_line(str(exc))}", where)


def database_fault(exc: DBAPIError, url: str | None) -> StartupError:
    where = _safe_url(url) if url else "LYTESTREAM_DATABASE_URL"
    if isinstance(exc, OperationalError):
        # At start-up no statement has carried patient data: the driver's connection message is safe to show.
        return StartupError(f"database unreachable: {_first_line(str(exc.orig or exc))[:300]}", where)
    return StartupError(f"database refused the start-up: {type(exc.orig or exc).__name__}", where)


def startup_line(exc: BaseException) -> str | None:
    """The one line for a start-up fault; None for anything else (a bug, which keeps its traceback)."""
    if isinstance(exc, StartupError):
        return f"lytestream: {exc}"
    if isinstance(exc, ValidationError):
        parts = [f"{_first_line(e['msg']).removeprefix('Value error, ')} ({_setting(tuple(e['loc']))})"
                 for e in exc.errors()]
        return "lytestream: invalid setting: " + "; ".join(parts)
    if isinstance(exc, SettingsError):
        return f"lytestream: invalid setting: {_first_line(str(exc))} (LYTESTREAM_* environment)"
    if isinstance(exc, PolicyError):
        return f"lytestream: policy refused: {_first_line(str(exc))} (policy file)"
    if isinstance(exc, AuthConfigError):
        return f"lytestream: {_first_line(str(exc))} (LYTESTREAM_AUTH__*)"
    if isinstance(exc, DBAPIError):
        return f"lytestream: {database_fault(exc, None)}"
    return None


def _first_line(text: str) -> str:
    return text.strip().splitlines()[0] if text.strip() else text


def _safe_url(url: str) -> str:
    try:
        return make_url(url).render_as_string(hide_password=True)
    except Exception:  # an unparsable URL: say so without echoing it (it may hold a password)
        return "LYTESTREAM_DATABASE_URL (not a valid URL)"
