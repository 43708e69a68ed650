"""Read a policy TOML file, apply the chosen profile and validate it.

This is the one module of the clinical core that reads a file. Decision support only: the
thresholds are site policy, to be signed off locally.
"""

from __future__ import annotations

import tomllib
from collections.abc import Mapping
from importlib import resources
from pathlib import Path
from typing import Any

from pydantic import ValidationError
from pydantic_core import ErrorDetails

from service.policy.model import Policy

__all__ = ["BASE_PROFILE", "PolicyError", "load_policy"]

BASE_PROFILE = "adult"  # the profile the top-level tables describe; others override them


class PolicyError(ValueError):
    """A policy that cannot be used. The message names the key path, e.g. ``sodium.rise.limit_24h``."""


def load_policy(path: Path | str | None = None, *, profile: str | None = None) -> Policy:
    """The validated policy from ``path`` (the packaged default when None).

    ``profile`` picks a profile listed in the file; when None the file's own ``profile`` key decides.
    Every profile in the file is validated, so a typo in one not chosen is still refused.
    """
    document = _read(path)
    profiles = document.pop("profiles", {})
    if not isinstance(profiles, dict):
        raise PolicyError("profiles: must be a table of profile tables")
    chosen = profile if profile is not None else document.get("profile", BASE_PROFILE)
    known = sorted({BASE_PROFILE, *profiles})
    if chosen not in known:
        raise PolicyError(f"profile: unknown profile {chosen!r} (known: {', '.join(known)})")

    resolved: dict[str, Policy] = {}
    for name in known:
        overrides = profiles.get(name, {})
        if not isinstance(overrides, dict):
            raise PolicyError(f"profiles.{name}: must be a table")
        data = _merge(document, overrides)
        data["profile"] = name
        resolved[name] = _validate(data, overrides, prefix=f"profiles.{name}.")
    return resolved[chosen]


def _read(path: Path | str | None) -> dict[str, Any]:
    try:
        if path is None:
            text = resources.files("service.policy").joinpath("default.toml").read_text("utf-8")
            where = "default.toml"
        else:
            text = Path(path).read_text("utf-8")
            where = str(path)
    except OSError as exc:
        raise PolicyError(f"policy file cannot be read: {exc}") from exc
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise PolicyError(f"{where}: not valid TOML: {exc}") from exc


def _merge(base: Mapping[str, Any], overrides: Mapping[str, Any]) -> dict[str, Any]:
    """Tables merge key by key; any other value (arrays included) replaces the base value."""
    merged = dict(base)
    for key, value in overrides.items():
        if isinstance(value, dict) and isinstance(merged.get(key), dict):
            merged[key] = _merge(merged[key], value)
        else:
            merged[key] = value
    return merged


def _validate(data: dict[str, Any], overrides: Mapping[str, Any], prefix: str) -> Policy:
    try:
        return Policy.model_validate(data)
    except ValidationError as exc:
        messages = []
        for error in exc.errors():
            path = ".".join(str(part) for part in error["loc"])
            if _overridden(overrides, error["loc"]):
                path = prefix + path
            messages.append(f"{path or '(top level)'}: {_describe(error)}")
        raise PolicyError("; ".join(messages)) from None


def _overridden(overrides: Mapping[str, Any], loc: tuple[int | str, ...]) -> bool:
    """Whether the faulty key came from a profile's overrides, so the message points there."""
    node: Any = overrides
    for part in loc:
        if not isinstance(node, Mapping) or part not in node:
            return False
        node = node[part]
    return bool(loc)


def _describe(error: ErrorDetails) -> str:
    kind, ctx = error["type"], error.get("ctx", {})
    if kind == "extra_forbidden":
        return "unknown key"
    if kind == "missing":
        return "missing"
    if kind == "greater_than":
        return f"must be > {ctx['gt']}"
    if kind == "greater_than_equal":
        return f"must be >= {ctx['ge']}"
    if kind == "value_error":
        return str(ctx.get("error", error["msg"]))
    return str(error["msg"])
