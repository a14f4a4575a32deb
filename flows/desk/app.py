"""The desk's web application (Starlette): sessions, CSRF, roles and security headers, thin handlers.

Handlers read through ``pipeline.records`` queries and ``views``; every signing act goes through
``acts``. Every page but the login page needs a live session; every form carries the session's
CSRF token (the login form a pre-session token, double-submitted), checked on the server.
A session ends when its account locks or gets a new password (changed at the desk or reset by the
administrator); after a reset the person's only page is the password form until they choose their own.
"""

from __future__ import annotations

import datetime as dt
import secrets
from collections.abc import Awaitable, Callable
from typing import Any

from starlette.applications import Starlette
from starlette.concurrency import run_in_threadpool
from starlette.datastructures import FormData
from starlette.middleware import Middleware
from starlette.middleware.base import BaseHTTPMiddleware
from starlette.requests import Request
from starlette.responses import FileResponse, HTMLResponse, RedirectResponse, Response
from starlette.routing import Route

from flows.desk import acts
from flows.desk.accounts import Desk, DeskBusy, SignInRefused, sign_in, sign_out, unlock_account
from flows.desk.charts import chart_page_data, trended_attributes
from flows.desk.pages import render, stylesheet
from flows.desk.passwords import PasswordNotChanged, change_password
from flows.desk.roles import DeskAct, may
from flows.desk.sessions import Session, SessionRegistry, same_token
from flows.desk.views import document_path, lot_view, morning_view
from pipeline.errors import InputError, LotgateError, NotFound
from pipeline.night.release_check import release_refusal
from pipeline.night.site_lots import latest_of_site
from pipeline.records import audit
from pipeline.records import desk_accounts as accounts
from pipeline.records.desk_queries import trail_events

SESSION_COOKIE = "lotgate_desk"
PRE_COOKIE = "lotgate_desk_login"
SERVED_FOLDERS = ("certificates", "reports", "archive", "quarantine", "review")
MEDIA = {".pdf": "application/pdf", ".csv": "text/plain; charset=utf-8", ".txt": "text/plain; charset=utf-8",
         ".json": "text/plain; charset=utf-8"}
HEADERS = {
    "Content-Security-Policy": "default-src 'self'; script-src 'none'; object-src 'none'; base-uri 'none'; "
                               "form-action 'self'; frame-ancestors 'none'",
    "X-Frame-Options": "DENY",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-store",
    "Cross-Origin-Opener-Policy": "same-origin",
    "Permissions-Policy": "camera=(), microphone=(), geolocation=()",
}


class SecurityHeaders(BaseHTTPMiddleware):
    async def dispatch(self, request: Request, call_next: Callable[[Request], Awaitable[Response]]) -> Response:
        response = await call_next(request)
        for key, value in HEADERS.items():
            response.headers.setdefault(key, value)
        return response


def create_app(desk: Desk, *, clock: Callable[[], float] | None = None) -> Starlette:
    registry = SessionRegistry(desk.settings.session_timeout_s, *(() if clock is None else (clock,)))
    secure = desk.settings.secure_cookies

    def page(template: str, status: int = 200, **context: Any) -> HTMLResponse:
        return HTMLResponse(render(template, plant=desk.ws.plant_name, **context), status_code=status)

    def refused(request: Request, text: str, status: int = 403, session: Session | None = None) -> HTMLResponse:
        return page("message.html", status, title="Not done", message=text, session=session)

    def client(request: Request) -> str:
        return request.client.host if request.client else "unknown"

    def session_of(request: Request) -> tuple[Session | None, bool]:
        """The live session of the request and whether its password must be changed first; a session of an
        account locked, or given a new password, since it began is ended."""
        token = request.cookies.get(SESSION_COOKIE)
        session = registry.get(token)
        if session is None:
            return None, False
        user = accounts.user_by_id(desk.store, session.user_id)
        standing = accounts.account_standing(desk.store, session.user_id)
        if user is None or standing.locked or user.credentials_version != session.credentials_version:
            registry.end(token)
            return None, False
        return session, standing.must_change_password

    def guarded(handler: Callable[[Request, Session, FormData], Response], act: DeskAct | None = None, *,
                before_new_password: bool = False):
        """No session: GET goes to the login page, anything else is refused. A form needs the CSRF token.
        A password the administrator set leaves only the pages ``before_new_password`` (the password
        form, sign-out) until the person chooses their own.

        The handler runs in a worker thread: it blocks on the store, Argon2 and signing (whose
        library runs its own event loop), never on the server's loop.
        """
        async def endpoint(request: Request) -> Response:
            session, must_change = await run_in_threadpool(session_of, request)
            if session is None:
                if request.method == "GET":
                    return RedirectResponse("/login", status_code=303)
                return refused(request, "Sign in first: your session has ended or never began.", 401)
            form = await request.form() if request.method == "POST" else FormData()
            if request.method == "POST" and not same_token(session.csrf, form.get("csrf")):
                return refused(request, "This form is out of date or did not come from the desk; "
                                        "open the page again.", 403, session)
            if must_change and not before_new_password:
                if request.method == "GET":
                    return RedirectResponse("/password", status_code=303)
                return refused(request, "Choose your own password first: the administrator set the one you "
                                        "signed in with.", 403, session)
            if act is not None and not may(session.role, act):
                return refused(request, f"Your role ({session.role}) does not allow this ({act}).", 403, session)
            try:
                return await run_in_threadpool(handler, request, session, form)
            except DeskBusy as exc:
                return refused(request, str(exc), 503, session)
            except NotFound as exc:
                return refused(request, str(exc), 404, session)
            except LotgateError as exc:
                return refused(request, str(exc), 400 if not isinstance(exc, acts.ActRefused) else 403, session)
        return endpoint

    async def login_page(request: Request) -> Response:
        token = secrets.token_urlsafe(32)
        response = page("login.html", csrf=token, error=None)
        response.set_cookie(PRE_COOKIE, token, httponly=True, secure=secure, samesite="strict", path="/login")
        return response

    async def login(request: Request) -> Response:
        form = await request.form()
        if not same_token(request.cookies.get(PRE_COOKIE, ""), form.get("csrf")) or not request.cookies.get(PRE_COOKIE):
            return refused(request, "This sign-in form is out of date; open the sign-in page again.")
        try:
            user = await run_in_threadpool(sign_in, desk, str(form.get("name", "")), str(form.get("password", "")),
                                           client(request))
        except (SignInRefused, DeskBusy) as exc:
            token = secrets.token_urlsafe(32)
            response = page("login.html", 401 if isinstance(exc, SignInRefused) else 503, csrf=token, error=str(exc))
            response.set_cookie(PRE_COOKIE, token, httponly=True, secure=secure, samesite="strict", path="/login")
            return response
        token, _ = registry.start(user.id, user.login, user.printed_name, user.role, user.credentials_version)
        response = RedirectResponse("/", status_code=303)
        response.set_cookie(SESSION_COOKIE, token, httponly=True, secure=secure, samesite="strict", path="/")
        response.delete_cookie(PRE_COOKIE, path="/login")
        return response

    def logout(request: Request, session: Session, form: FormData) -> Response:
        registry.end(request.cookies.get(SESSION_COOKIE))
        sign_out(desk, session.user_id, session.login, "logout")
        response = RedirectResponse("/login", status_code=303)
        response.delete_cookie(SESSION_COOKIE, path="/")
        return response

    def password_form(request: Request, session: Session, form: FormData) -> Response:
        must = accounts.account_standing(desk.store, session.user_id).must_change_password
        return page("password.html", session=session, error=None, done=False, must_change=must)

    def password_change(request: Request, session: Session, form: FormData) -> Response:
        """The person's own new password; every session of theirs ends and this one starts afresh."""
        try:
            user = change_password(desk, session.user_id, current=str(form.get("current", "")),
                                   new=str(form.get("new", "")), repeat=str(form.get("repeat", "")),
                                   client=client(request))
        except (PasswordNotChanged, InputError) as exc:
            must = accounts.account_standing(desk.store, session.user_id).must_change_password
            return page("password.html", 403 if isinstance(exc, PasswordNotChanged) else 400, session=session,
                        error=str(exc), done=False, must_change=must)
        registry.end_all_of(user.id)
        token, fresh = registry.start(user.id, user.login, user.printed_name, user.role, user.credentials_version)
        response = page("password.html", session=fresh, error=None, done=True, must_change=False,
                        key_resealed=user.key_file is not None)
        response.set_cookie(SESSION_COOKIE, token, httponly=True, secure=secure, samesite="strict", path="/")
        return response

    def morning(request: Request, session: Session, form: FormData) -> Response:
        return page("morning.html", session=session, view=morning_view(desk.ws, desk.store),
                    charts=sorted(trended_attributes(desk.ws).items()))

    def lot(request: Request, session: Session, form: FormData) -> Response:
        lot_id = request.query_params.get("id", "")
        trended = trended_attributes(desk.ws)
        view = lot_view(desk.ws, desk.store, lot_id, ())
        if view is None:
            return page("message.html", 404, session=session, title="No such lot",
                        message=f"No decision is stored for lot {lot_id}." if lot_id else
                        "No lot was named: open a lot from the morning view.")
        product = view.latest.record.product
        charts = [chart_page_data(desk.ws, desk.store, product, code, highlight=lot_id)
                  for code in trended.get(product, ())]
        may_release = may(session.role, DeskAct.RELEASE)
        barred = release_refusal(desk.ws, desk.store, view.latest) if may_release else None
        return page("lot.html", session=session, view=view, charts=charts, release_barred=barred,
                    may_approve=may(session.role, DeskAct.APPROVE), may_release=may_release,
                    may_reject=may(session.role, DeskAct.REJECT), may_investigate=may(session.role, DeskAct.INVALIDATE),
                    investigation_meaning=acts.INVESTIGATION_MEANING)

    def investigate(request: Request, session: Session, form: FormData) -> Response:
        shown = acts.investigate(desk, session, str(form.get("lot", "")), test=str(form.get("test", "")).strip(),
                                 outcome=str(form.get("outcome", "")), reference=str(form.get("reference", "")).strip(),
                                 reason=str(form.get("reason", "")), retest_plan=str(form.get("retest_plan", "")),
                                 password=str(form.get("password", "")))
        return page("signed.html", session=session, shown=shown)

    def _act_of(word: object) -> DeskAct:
        """The lot act a form names; anything else is a rejection's form (the least a click can do)."""
        return {"approve": DeskAct.APPROVE, "release": DeskAct.RELEASE}.get(str(word), DeskAct.REJECT)

    def _sign_context(session: Session, lot_id: str, act: DeskAct) -> dict[str, Any]:
        latest = latest_of_site(desk.ws, desk.store, lot_id)
        if latest is None:
            raise acts.ActRefused(f"no decision is stored for lot {lot_id}")
        return dict(session=session, lot=latest, act=str(act), meaning=acts.meaning_of(act), error=None)

    def sign_form(request: Request, session: Session, form: FormData) -> Response:
        act = _act_of(request.query_params.get("act"))
        if not may(session.role, act):
            return refused(request, f"Your role ({session.role}) does not allow this ({act}).", 403, session)
        context = _sign_context(session, request.query_params.get("id", ""), act)
        if act == DeskAct.RELEASE:  # said before the password is typed; the use case refuses it again
            context["error"] = release_refusal(desk.ws, desk.store, context["lot"])
        return page("sign.html", **context)

    def sign(request: Request, session: Session, form: FormData) -> Response:
        act = _act_of(form.get("act"))
        lot_id = str(form.get("lot", ""))
        reason, password = str(form.get("reason", "")), str(form.get("password", ""))
        try:
            if act == DeskAct.APPROVE:
                shown = acts.approve(desk, session, lot_id, reason=reason, password=password)
            else:
                shown = acts.decide(desk, session, lot_id, release=act == DeskAct.RELEASE, reason=reason,
                                    password=password)
        except acts.ActRefused as exc:
            return page("sign.html", 403, **{**_sign_context(session, lot_id, act), "error": str(exc)})
        except InputError as exc:  # the use case refused the act (a release the lot's results bar): nothing written
            return page("sign.html", 400, **{**_sign_context(session, lot_id, act), "error": str(exc)})
        return page("signed.html", session=session, shown=shown)

    def chart(request: Request, session: Session, form: FormData) -> Response:
        product, attribute = request.query_params.get("product", ""), request.query_params.get("attribute", "")
        data = chart_page_data(desk.ws, desk.store, product, attribute)
        return page("chart.html", session=session, data=data, may_rebaseline=may(session.role, DeskAct.REBASELINE),
                    error=None, meaning=acts.REBASELINE_MEANING)

    def rebaseline(request: Request, session: Session, form: FormData) -> Response:
        product, code = str(form.get("product", "")), str(form.get("attribute", ""))
        data = chart_page_data(desk.ws, desk.store, product, code)
        count = str(form.get("count", "")).strip()
        try:
            shown = acts.rebaseline_chart(desk, session, product, data.attribute, reason=str(form.get("reason", "")),
                                          password=str(form.get("password", "")),
                                          from_lot=str(form.get("from_lot", "")).strip() or None,
                                          count=int(count) if count.isdigit() else None)
        except acts.ActRefused as exc:
            return page("chart.html", 403, session=session, data=data, may_rebaseline=True, error=str(exc),
                        meaning=acts.REBASELINE_MEANING)
        return page("signed.html", session=session, shown=shown)

    def trail(request: Request, session: Session, form: FormData) -> Response:
        q = request.query_params
        try:
            day_from = dt.date.fromisoformat(q["from"]) if q.get("from") else None
            day_to = dt.date.fromisoformat(q["to"]) if q.get("to") else None
        except ValueError:
            return refused(request, "Dates are written YYYY-MM-DD.", 400, session)
        events = trail_events(desk.store, lot_id=q.get("lot") or None, day_from=day_from, day_to=day_to)
        check = audit.verify_trail(desk.store, desk.ws.log) if q.get("verify") else None
        return page("audit.html", session=session, events=events, check=check, lot=q.get("lot", ""),
                    day_from=q.get("from", ""), day_to=q.get("to", ""))

    def files(request: Request, session: Session, form: FormData) -> Response:
        relative = request.path_params["path"]
        target = document_path(desk.ws.root, relative, SERVED_FOLDERS)
        if target is None:
            return refused(request, "That file is not one the desk serves: only the workspace's certificates, "
                                    "reports, archived and quarantined files.", 404, session)
        media = MEDIA.get(target.suffix.lower(), "application/octet-stream")
        disposition = "inline" if target.suffix.lower() == ".pdf" else "attachment"
        return FileResponse(target, media_type=media, content_disposition_type=disposition, filename=target.name)

    def users_page(request: Request, session: Session, form: FormData) -> Response:
        rows = [(u, accounts.account_standing(desk.store, u.id)) for u in accounts.users(desk.store)]
        return page("users.html", session=session, rows=rows)

    def unlock(request: Request, session: Session, form: FormData) -> Response:
        unlock_account(desk, str(form.get("login", "")), session.login)
        return RedirectResponse("/users", status_code=303)

    async def css(request: Request) -> Response:
        return Response(stylesheet(), media_type="text/css")

    routes = [
        Route("/login", login_page, methods=["GET"]),
        Route("/login", login, methods=["POST"]),
        Route("/logout", guarded(logout, before_new_password=True), methods=["POST"]),
        Route("/password", guarded(password_form, before_new_password=True), methods=["GET"]),
        Route("/password", guarded(password_change, before_new_password=True), methods=["POST"]),
        Route("/", guarded(morning), methods=["GET"]),
        Route("/lot", guarded(lot), methods=["GET"]),
        Route("/lot/sign", guarded(sign_form), methods=["GET"]),
        Route("/lot/sign", guarded(sign), methods=["POST"]),
        Route("/lot/investigate", guarded(investigate, DeskAct.INVALIDATE), methods=["POST"]),
        Route("/chart", guarded(chart), methods=["GET"]),
        Route("/chart/rebaseline", guarded(rebaseline, DeskAct.REBASELINE), methods=["POST"]),
        Route("/audit", guarded(trail), methods=["GET"]),
        Route("/files/{path:path}", guarded(files), methods=["GET"]),
        Route("/users", guarded(users_page, DeskAct.MANAGE_USERS), methods=["GET"]),
        Route("/users/unlock", guarded(unlock, DeskAct.MANAGE_USERS), methods=["POST"]),
        Route("/static/desk.css", css, methods=["GET"]),
    ]
    return Starlette(routes=routes, middleware=[Middleware(SecurityHeaders)])
