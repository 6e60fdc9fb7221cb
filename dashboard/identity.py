"""Who is entering a disposition: the author identity shown on the form and stored with the record.

The order of trust, first that applies:

1. ``login``: the user signed in through Streamlit's OIDC login (``st.login``; ``[auth]`` in
   ``.streamlit/secrets.toml``); the name is their e-mail (else name, else subject id).
2. ``proxy``: a request header that an authenticating reverse proxy sets, **only** when the operator named
   that header (``lotline serve --user-header X-Forwarded-User``). Any client could send such a header, so
   it is trusted only because the operator keeps the server bound to 127.0.0.1 behind that proxy.
3. ``server account``: the operating-system user running the server (a single-user workstation).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

MAX_NAME_LEN = 200


@dataclass(frozen=True)
class Author:
    """The identity a disposition is recorded under, and where it came from."""

    name: str
    source: str  # "login", "proxy" or "server account"

    @property
    def label(self) -> str:
        """Text for the form, e.g. ``ana@example.org (login)``."""
        return f"{self.name} ({self.source})"


def _clean(value: object) -> str:
    text = "" if value is None else str(value)
    text = "".join(ch for ch in text if ch.isprintable()).strip()
    return text[:MAX_NAME_LEN]


def resolve_author(
    user: Mapping[str, object] | None,
    headers: Mapping[str, str] | None,
    header_name: str | None,
    os_user: str,
) -> Author:
    """Pick the author from the login, else the configured proxy header, else the server's OS user.

    Example:
        >>> resolve_author({"is_logged_in": True, "email": "ana@example.org"}, {}, None, "svc").label
        'ana@example.org (login)'
        >>> resolve_author({}, {"X-User": "bo"}, "X-User", "svc").label
        'bo (proxy)'
        >>> resolve_author({}, {"X-User": "bo"}, None, "svc").label
        'svc (server account)'
    """
    user = user or {}
    if user.get("is_logged_in", False):
        for key in ("email", "name", "sub"):
            name = _clean(user.get(key))
            if name:
                return Author(name, "login")
    if header_name and headers:
        wanted = header_name.lower()
        for key, value in headers.items():
            if str(key).lower() == wanted:
                name = _clean(value)
                if name:
                    return Author(name, "proxy")
    return Author(_clean(os_user) or "unknown", "server account")
