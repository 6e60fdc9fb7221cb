"""Where the disposition author comes from: login, else the operator's trusted proxy header, else the OS user."""

from __future__ import annotations

from dashboard.identity import Author, resolve_author


def test_resolve_author_prefers_the_oidc_login():
    user = {"is_logged_in": True, "email": "a.engineer@example.org", "name": "A. Engineer"}
    assert resolve_author(user, {"X-User": "proxy-user"}, "X-User", "svc") == Author(
        "a.engineer@example.org", "login"
    )


def test_resolve_author_login_without_email_uses_name():
    assert resolve_author({"is_logged_in": True, "name": "B. Eng"}, {}, None, "svc") == Author(
        "B. Eng", "login"
    )


def test_resolve_author_not_logged_in_ignores_user_fields():
    # AppTest's default user has an email but no is_logged_in (stack notes §3)
    assert resolve_author({"email": "test@example.com"}, {}, None, "svc") == Author("svc", "server account")


def test_resolve_author_uses_proxy_header_only_when_configured():
    headers = {"x-forwarded-user": "c.eng"}
    assert resolve_author({}, headers, "X-Forwarded-User", "svc") == Author("c.eng", "proxy")
    assert resolve_author({}, headers, None, "svc") == Author("svc", "server account")


def test_resolve_author_strips_control_characters_and_bounds_length():
    a = resolve_author({}, {"X-User": "eve\n\x1b[31m" + "x" * 500}, "X-User", "svc")
    assert a.source == "proxy" and "\n" not in a.name and "\x1b" not in a.name and len(a.name) == 200


def test_resolve_author_empty_header_falls_back_to_os_user():
    assert resolve_author({}, {"X-User": "  "}, "X-User", "svc").label == "svc (server account)"
