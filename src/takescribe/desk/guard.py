"""Who may talk to the desk: this computer, the browser holding the session key, the desk's own pages.

- The server binds 127.0.0.1 only, and answers only requests whose ``Host`` is its own
  address (a page elsewhere cannot reach it through a name that resolves here).
- Every request must carry the session key: a random value printed once in the link the
  desk opens, then kept in an HttpOnly, SameSite=Strict cookie.
- Every change (any method but GET/HEAD) must come from the desk's own pages: its
  ``Origin`` (or, lacking that, ``Referer``) must be the desk's address, and it must carry
  the change check (a value derived from the key, put in each page) as the ``X-Desk-Check``
  header or the ``check`` form field.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets

from flask import redirect, request

__all__ = ["new_key", "change_check", "install_guard", "GuardError"]

SAFE_METHODS = ("GET", "HEAD")


class GuardError(Exception):
    """A refused request; ``status`` is the HTTP status, the text says why and what to do."""

    def __init__(self, status: int, text: str) -> None:
        super().__init__(text)
        self.status = status


def new_key() -> str:
    """A fresh random session key (256 bits)."""
    return secrets.token_urlsafe(32)


def change_check(key: str) -> str:
    """The change check the pages carry (derived from the key, so it cannot be guessed without it)."""
    return hmac.new(key.encode(), b"takescribe-desk-change", hashlib.sha256).hexdigest()


def _own_origins(port: int) -> tuple[str, ...]:
    return (f"http://127.0.0.1:{port}", f"http://localhost:{port}")


def install_guard(app, *, key: str, port_of) -> None:
    """Check every request to ``app`` as the module docstring says.

    ``port_of`` returns the port the server listens on (known only once it is bound).
    """
    check = change_check(key)
    cookie = "takescribe_desk_key"

    @app.before_request
    def _guard():
        port = port_of()
        if request.host not in (f"127.0.0.1:{port}", f"localhost:{port}"):
            raise GuardError(400, f"this desk answers only at 127.0.0.1:{port}, not at {request.host!r}")
        given = request.args.get("key")
        if given is not None and request.method in SAFE_METHODS:
            if not hmac.compare_digest(given, key):
                raise GuardError(403, "this link holds an old or wrong key; open the link the desk printed"
                                      " when it started")
            response = redirect(request.path)
            response.set_cookie(cookie, key, httponly=True, samesite="Strict", path="/")
            return response
        if not hmac.compare_digest(request.cookies.get(cookie, ""), key):
            raise GuardError(403, "no session key: open the desk with the link it printed in the terminal when"
                                  " it started (the key keeps other programs on this computer out)")
        if request.method in SAFE_METHODS:
            return None
        origin = request.headers.get("Origin") or _origin_of(request.headers.get("Referer", ""))
        if origin not in _own_origins(port):
            raise GuardError(403, f"a change was sent from {origin or 'an unknown page'}, not from the desk's own"
                                  " pages; nothing was changed")
        sent = request.headers.get("X-Desk-Check") or request.form.get("check", "")
        if not hmac.compare_digest(sent, check):
            raise GuardError(403, "this change carries no valid check from a desk page (was the page open from an"
                                  " earlier run?); reload the page and try again; nothing was changed")
        return None

    @app.context_processor
    def _check_in_pages():
        return {"check": check}



def _origin_of(url: str) -> str:
    parts = url.split("/")
    return "/".join(parts[:3]) if len(parts) >= 3 and parts[0] in ("http:", "https:") else ""
