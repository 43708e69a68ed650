"""``Subscription.channel.header`` strings ("Name: value") → HTTP header pairs. Pure.

The backport IG says each channel.header SHALL be sent as an HTTP header. These strings usually carry
credentials, so nothing here logs or echoes a value: a refusal names the header position only.
"""

from __future__ import annotations

import re

__all__ = ["RESERVED", "HeaderError", "parse_header"]

# RFC 9110 §5.1 field-name = token; tchar set from §5.6.2.
_TOKEN = re.compile(r"^[!#$%&'*+\-.^_`|~0-9A-Za-z]+$")
# Field values may not carry CR, LF or NUL (RFC 9110 §5.5): they would split or smuggle headers.
_BAD_VALUE = re.compile(r"[\r\n\x00]")
# Headers we set ourselves: a subscriber's copy would contradict the IG rule that the content type
# equals channel.payload, or would break framing of the request.
RESERVED = frozenset({"content-type", "content-length", "host", "transfer-encoding", "connection"})


class HeaderError(ValueError):
    """A channel.header that cannot be sent; the message never contains the header's value."""


def parse_header(raw: str) -> tuple[str, str]:
    """``"Authorization: Bearer x"`` → ``("Authorization", "Bearer x")``; raise HeaderError otherwise."""
    if not isinstance(raw, str):
        raise HeaderError("a header must be a string 'Name: value'")
    name, sep, value = raw.partition(":")
    name, value = name.strip(), value.strip()
    if not sep or not name:
        raise HeaderError("a header must have the form 'Name: value'")
    if not _TOKEN.match(name):
        raise HeaderError("the header name is not an HTTP token")
    if _BAD_VALUE.search(value):
        raise HeaderError("the header value contains a line break or NUL")
    if name.lower() in RESERVED:
        raise HeaderError(f"the header {name} is set by the server and may not be supplied")
    return name, value
