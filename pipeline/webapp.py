"""`cardiosieve serve`: the review page, a small Starlette application over the worklist store.

Routes
    GET  /                       the worklist (filters: tier, screen, status, location, date)
    GET  /item/{item_id}         one item: summary, criteria, caveats, plots, review form, reviews
    POST /item/{item_id}/review  record a review (store.record_review, as `cardiosieve review`)
    GET  /style.css              the page's style sheet

Safety
    - Writes are POST only, each form carries a CSRF token: HMAC-SHA256 under a per-process
      secret of (a random value kept in a SameSite=Strict, HttpOnly cookie, the item id). A POST
      without a cookie or token, or with a token that does not match, is 403.
    - Every response has a Content-Security-Policy with no outside source (plots are inline
      data: images), X-Frame-Options: DENY, nosniff, no referrer, no caching.
    - There is no login: the page binds to 127.0.0.1 unless told otherwise, and a site that
      opens it wider puts it behind its authenticating proxy (docs/review-page.md).
    - Log lines carry no identifier: uvicorn's access log (which prints paths, and paths hold
      item ids) is off, and what this module logs is counts and exception types only. A store
      that cannot be opened or read gives a plain 503 page naming no URL or value.
"""
from __future__ import annotations

import hashlib
import hmac
import logging
import secrets

from cardiosieve.pipeline import pages

log = logging.getLogger(__name__)

CSRF_COOKIE = "cardiosieve_csrf"
CSRF_FIELD = "csrf_token"
SECURITY_HEADERS = {
    "Content-Security-Policy": "default-src 'none'; style-src 'self'; img-src 'self' data:; form-action 'self'; "
                               "frame-ancestors 'none'; base-uri 'none'",
    "X-Frame-Options": "DENY",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-store",
}
STORE_DOWN = ("The worklist store cannot be reached",
              "The page could not open or read the worklist database. Nothing was recorded. Try again in a "
              "minute; if it stays unavailable, tell the team that runs cardiosieve (the server's log names "
              "the kind of error).")


class CsrfTokens:
    """Tokens bound to a browser (its cookie value) and a form (the item id)."""

    def __init__(self, secret: bytes | None = None):
        self.secret = secret or secrets.token_bytes(32)

    @staticmethod
    def new_cookie() -> str:
        return secrets.token_urlsafe(24)

    def token(self, cookie: str, item_id: str) -> str:
        return hmac.new(self.secret, f"{cookie}|review|{item_id}".encode(), hashlib.sha256).hexdigest()

    def valid(self, cookie: str | None, item_id: str, token: str | None) -> bool:
        if not cookie or not token:
            return False
        return hmac.compare_digest(self.token(cookie, item_id), str(token))


def create_app(data: pages.ReviewData, *, tokens: CsrfTokens | None = None):
    """The Starlette application over `data` (pages.ReviewData)."""
    import pandas as pd
    from sqlalchemy.exc import SQLAlchemyError
    from starlette.applications import Starlette
    from starlette.exceptions import HTTPException
    from starlette.middleware import Middleware
    from starlette.middleware.base import BaseHTTPMiddleware
    from starlette.responses import HTMLResponse, RedirectResponse, Response
    from starlette.routing import Route

    from cardiosieve.pipeline.errors import BadInputError
    from cardiosieve.pipeline.store import NOTE_MAX_CHARS, OUTCOMES, ROLE_MAX_CHARS, normalise_outcome, record_review

    tokens = tokens or CsrfTokens()
    store_errors = (BadInputError, SQLAlchemyError, OSError)

    def html(text: str, status: int = 200) -> HTMLResponse:
        return HTMLResponse(text, status_code=status)

    def store_down(exc: BaseException) -> HTMLResponse:
        log.warning("review page: worklist store unavailable (%s)", type(exc).__name__)
        data._engine = None                  # open it again on the next request
        return html(pages.message_page(*STORE_DOWN), 503)

    def not_found() -> HTMLResponse:
        return html(pages.message_page("No such item", "There is no item with that id in the worklist store."), 404)

    def cookie_of(request) -> tuple[str, bool]:
        have = request.cookies.get(CSRF_COOKIE)
        return (have, False) if have else (tokens.new_cookie(), True)

    def with_cookie(response: Response, cookie: str, is_new: bool) -> Response:
        if is_new:
            response.set_cookie(CSRF_COOKIE, cookie, httponly=True, samesite="strict", path="/")
        return response

    async def worklist(request):
        q = request.query_params
        filters = {k: (q.get(k) or None) for k in ("tier", "screen", "status", "location", "date")}
        error = None
        from cardiosieve.pipeline.worklist import STATUSES
        from cardiosieve.screens import SCREENS
        bad = [k for k, ok in (("tier", filters["tier"] in (None, *map(str, pages.TIER_WORDS))),
                               ("screen", filters["screen"] in (None, *SCREENS)),
                               ("status", filters["status"] in (None, *STATUSES)),
                               ("date", filters["date"] is None or _is_date(filters["date"]))) if not ok]
        for k in bad:
            filters[k] = None
        if bad:
            error = "Filter not understood and ignored: " + ", ".join(bad) + "."
        try:
            body = pages.worklist_page(data, filters, error=error)
        except store_errors as exc:
            return store_down(exc)
        return html(body, 400 if bad else 200)

    def _is_date(text: str) -> bool:
        try:
            pd.Timestamp(text)
        except (ValueError, TypeError):
            return False
        return len(text) == 10

    async def item(request):
        item_id = request.path_params["item_id"]
        try:
            found = data.item(item_id)
            if found is None:
                return not_found()
            cookie, is_new = cookie_of(request)
            body = pages.item_page(data, found, csrf_token=tokens.token(cookie, item_id),
                                   recorded=request.query_params.get("recorded") == "1")
        except store_errors as exc:
            return store_down(exc)
        return with_cookie(html(body), cookie, is_new)

    async def review(request):
        item_id = request.path_params["item_id"]
        form = await request.form()
        cookie = request.cookies.get(CSRF_COOKIE)
        if not tokens.valid(cookie, item_id, form.get(CSRF_FIELD)):
            return html(pages.message_page("Form expired or not from this page",
                                           "The review was not recorded: the form's security token is missing or "
                                           "does not match. Open the item again and resubmit."), 403)
        fields = {k: str(form.get(k) or "") for k in ("outcome", "role", "note")}
        try:
            found = data.item(item_id)
            if found is None:
                return not_found()
            outcome = normalise_outcome(fields["outcome"]) if fields["outcome"] else ""
            problem = None
            if outcome not in OUTCOMES:
                problem = "Choose one of the outcomes listed."
            elif not fields["role"].strip():
                problem = "Give the reviewer's role (for example, cardiology registrar)."
            elif len(fields["role"]) > ROLE_MAX_CHARS or len(fields["note"]) > NOTE_MAX_CHARS:
                problem = f"Role at most {ROLE_MAX_CHARS} characters, note at most {NOTE_MAX_CHARS}."
            if problem is None:
                try:
                    record_review(data.engine(), item_id, outcome, fields["role"], fields["note"] or None,
                                  pd.Timestamp.now(tz="UTC"), recorded_via="web")
                except ValueError as exc:      # store.record_review's own checks (reasons, no values)
                    problem = f"The review was not recorded: {exc}."
            if problem is not None:
                body = pages.item_page(data, found, csrf_token=tokens.token(cookie, item_id), form=fields,
                                       error=problem)
                return html(body, 400)
        except store_errors as exc:
            return store_down(exc)
        log.info("review page: one review recorded")
        return RedirectResponse(f"/item/{item_id}?recorded=1#reviews", status_code=303)

    async def style(request):
        return Response(pages.CSS, media_type="text/css")

    async def no_icon(request):
        return Response(status_code=204)

    async def http_error(request, exc):
        if exc.status_code == 404:
            return html(pages.message_page("Not found", "There is no page at that address."), 404)
        if exc.status_code == 405:
            return html(pages.message_page("Not allowed", "That action is not allowed here."), 405)
        return html(pages.message_page("Request not understood", "The request could not be handled."), exc.status_code)

    def internal_error(exc: BaseException) -> HTMLResponse:
        log.error("review page: internal error (%s)", type(exc).__name__)
        return html(pages.message_page("Something went wrong", "The page could not be shown. Nothing was recorded "
                                       "unless the item's review history shows it."), 500)

    async def server_error(request, exc):
        return internal_error(exc)

    def guarded(endpoint):
        """Catch what a route raises here, so that neither Starlette nor uvicorn logs a traceback
        (an exception's text may quote a value): the log gets the exception's type only."""
        async def run(request):
            try:
                return await endpoint(request)
            except HTTPException:
                raise
            except Exception as exc:
                return internal_error(exc)
        return run

    class SecurityHeaders(BaseHTTPMiddleware):
        async def dispatch(self, request, call_next):
            response = await call_next(request)
            for k, v in SECURITY_HEADERS.items():
                response.headers.setdefault(k, v)
            return response

    return Starlette(routes=[Route("/", guarded(worklist)), Route("/style.css", style), Route("/favicon.ico", no_icon),
                             Route("/item/{item_id}", guarded(item), methods=["GET"]),
                             Route("/item/{item_id}/review", guarded(review), methods=["POST"])],
                     middleware=[Middleware(SecurityHeaders)],
                     exception_handlers={HTTPException: http_error, Exception: server_error})


def serve(data: pages.ReviewData, host: str = "127.0.0.1", port: int = 8750) -> None:
    """Run the page under uvicorn until interrupted, with its access log off (paths name items)."""
    import uvicorn
    if host not in ("127.0.0.1", "localhost", "::1"):
        log.warning("review page: listening on %s, which other machines can reach, and the page has no login: "
                    "put it behind the site's authenticating proxy", host)
    config = uvicorn.Config(create_app(data), host=host, port=port, access_log=False, log_level="warning",
                            server_header=False)
    log.info("review page: http://%s:%d/ (stop with Ctrl-C)", host, port)
    uvicorn.Server(config).run()
