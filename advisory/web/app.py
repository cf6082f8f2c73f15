"""The console's Starlette application: routes, sign-in, forms, error pages.

Every page is rendered on the server (the tables work without JavaScript).  A request runs its reads
and its one change in one database transaction, in a worker thread.  A block, notice, station or
recipient the viewer may not see answers 404, exactly as one that does not exist.
"""

from __future__ import annotations

import datetime as dt
import logging
from pathlib import Path
from urllib.parse import urlencode
from zoneinfo import ZoneInfo

import jinja2
from starlette.applications import Starlette
from starlette.concurrency import run_in_threadpool
from starlette.exceptions import HTTPException
from starlette.middleware import Middleware
from starlette.middleware.sessions import SessionMiddleware
from starlette.requests import Request
from starlette.responses import RedirectResponse, Response
from starlette.routing import Mount, Route
from starlette.staticfiles import StaticFiles
from starlette.templating import Jinja2Templates

from advisory import settings as settings_mod
from advisory.crops import thresholds
from advisory.ingest.farm_file import record_stage
from advisory.store.db import Database
from advisory.store.schema import AuditEntry, Block, Recipient
from advisory.web import auth, display, forms, queries, svg

log = logging.getLogger("advisory.web")
HERE = Path(__file__).resolve().parent
#: The short caution every page with a risk or a plan carries (see advisory.risk.cautions).
CAUTION = ("Decision support only, built from a forecast: the block's own thermometers, local codes, "
           "workplace-safety rules and advice from your extension service or a licensed adviser come first.")
SESSION_HOURS = 12


def _env() -> jinja2.Environment:
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(HERE / "templates"), autoescape=True,
                             undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    env.globals.update(level=display.level, method=display.method, temp=display.temp, local=display.local,
                       num=display.num, unit=display.unit, figures=display.figures, CAUTION=CAUTION)
    return env


class Forbidden(Exception):
    """The viewer may see this but not change it."""


def create_app(db_url: str, *, secret: str | None = None, https_only: bool = False) -> Starlette:
    """The console for the database at ``db_url``; ``secret`` signs the session cookies
    (default: :func:`advisory.web.auth.signing_secret`)."""
    db = Database(db_url)
    templates = Jinja2Templates(env=_env())
    cfg_holder: dict = {}

    def cfg():
        if "cfg" not in cfg_holder:
            cfg_holder["cfg"] = settings_mod.load(db_url)
        return cfg_holder["cfg"]

    def render(request: Request, name: str, ctx: dict, status: int = 200) -> Response:
        ctx = {"request": request, "viewer": ctx.pop("viewer", None),
               "csrf": auth.csrf_token(request.session), **ctx}
        return templates.TemplateResponse(request, name, ctx, status_code=status)

    def error_page(request: Request, status: int, title: str, text: str, viewer=None) -> Response:
        ctx = {"request": request, "viewer": viewer, "csrf": auth.csrf_token(request.session) if viewer else "",
               "status": status, "title": title, "text": text}
        return templates.TemplateResponse(request, "error.html", ctx, status_code=status)

    def page(*, login: bool = True):
        def deco(fn):
            async def endpoint(request: Request):
                form = None
                if request.method == "POST":
                    form = await request.form()
                    if not auth.csrf_ok(request.session, form.get("csrf")):
                        return error_page(request, 403, "Form expired",
                                          "This form's security token did not match. Open the page again and "
                                          "resubmit.")
                return await run_in_threadpool(run, fn, request, form, login)

            endpoint.__name__ = fn.__name__
            return endpoint
        return deco

    def run(fn, request, form, login):
        with db.transaction() as s:
            v = auth.viewer(s, request.session.get("uid"))
            if login and v is None:
                request.session.pop("uid", None)
                target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
                return RedirectResponse("/login?" + urlencode({"next": target}), status_code=303)
            try:
                return fn(request, s, v, form)
            except queries.NotFound:
                s.rollback()
                return error_page(request, 404, "Not found",
                                  "There is nothing here, or nothing you have access to.", v)
            except Forbidden as exc:
                s.rollback()
                return error_page(request, 403, "Not allowed", str(exc), v)

    # ------------------------------------------------------------------ sign in and out

    @page(login=False)
    def login_page(request, s, v, form):
        nxt = request.query_params.get("next", "/")
        if request.method == "GET":
            return render(request, "login.html", {"next": nxt, "error": None, "username": ""})
        username, password = str(form.get("username", "")), str(form.get("password", ""))
        nxt = str(form.get("next", "/"))
        user = auth.authenticate(s, username, password)
        if user is None:
            return render(request, "login.html", {"next": nxt, "error": "Wrong user name or password.",
                                                  "username": username}, status=400)
        request.session.clear()
        request.session["uid"] = user.id
        auth.csrf_token(request.session)
        log.info("signed in: %s", user.username)
        return RedirectResponse(nxt if nxt.startswith("/") and not nxt.startswith("//") else "/",
                                status_code=303)

    @page(login=False)
    def logout(request, s, v, form):
        request.session.clear()
        return RedirectResponse("/login", status_code=303)

    # ------------------------------------------------------------------ overviews

    def _overview(request, s, v, kind):
        qp = request.query_params
        avail = queries.nights(s, v, kind)
        night = None
        if qp.get("night"):
            try:
                night = dt.date.fromisoformat(qp["night"])
            except ValueError:
                night = None
        if night is None:
            night = avail[0] if avail else None
        farms = queries.farms_for(s, v)
        farm_id = _int(qp.get("farm"))
        if farm_id is not None and farm_id not in {f for f, _ in farms}:
            farm_id = -1  # a farm not shown to this viewer: nothing
        level = qp.get("level") or None
        if level not in (*queries.LEVEL_KEYS[kind], "none", None):
            level = None
        crop = qp.get("crop") or None
        sort = qp.get("sort") if qp.get("sort") in queries.SORTS else "worst"
        ov = queries.overview(s, v, kind, night, farm_id=farm_id, level=level, crop=crop, sort=sort,
                              page=_int(qp.get("page")) or 1)
        keep = {k: val for k, val in (("night", night.isoformat() if night else None),
                                      ("farm", farm_id if farm_id not in (None, -1) else None),
                                      ("level", level), ("crop", crop), ("sort", sort)) if val}
        return render(request, "overview.html", {
            "viewer": v, "ov": ov, "kind": kind, "nights": avail, "farms": farms,
            "crops": queries.crops_for(s, v), "levels": queries.LEVEL_KEYS[kind], "sel": keep,
            "farm_id": farm_id, "qs": lambda **kw: urlencode({**keep, **kw}),
        })

    @page()
    def tonight(request, s, v, form):
        return _overview(request, s, v, "frost")

    @page()
    def heat_day(request, s, v, form):
        return _overview(request, s, v, "heat")

    # ------------------------------------------------------------------ a block's night

    def _block_ctx(request, s, v, b: Block, errors=None, values=None):
        nights = queries.block_nights(s, b.id)
        night = None
        if request.query_params.get("night"):
            try:
                night = dt.date.fromisoformat(request.query_params["night"])
            except ValueError:
                night = None
        if night is None:
            night = nights[0] if nights else None
        fc = queries.latest_forecast(s, b.id, night) if night else None
        payload = fc.payload if fc is not None else {}
        ct = queries.critical(b.crop, b.stage, b.t10_override_c, b.t90_override_c)
        units, tz = b.farm.units, b.farm.timezone
        chart = ""
        if payload.get("curve"):
            chart = _night_chart(b, payload, ct, units, tz)
        blocks_sk, _st, _rel, overall = queries.skill(s, v, "frost", block_id=b.id)
        return {
            "viewer": v, "b": b, "nights": nights, "night": night, "fc": fc, "p": payload, "ct": ct,
            "chart": chart, "notices": queries.block_notices(s, b.id, night),
            "history": queries.stage_history(s, b.id), "skill": overall if overall.n else None,
            "audit": queries.audit(s, block_id=b.id), "stages": thresholds.stages_for(b.crop),
            "errors": errors or {}, "values": values or {}, "done": request.query_params.get("done"),
            "may_edit": v.may_edit_block(b.farm_id), "may_edit_recipients": v.may_edit_recipient(b.farm_id),
            "today": dt.datetime.now(ZoneInfo(tz)).date(),
        }

    @page()
    def block_page(request, s, v, form):
        b = queries.block(s, v, request.path_params["block_id"])
        return render(request, "block.html", _block_ctx(request, s, v, b))

    @page()
    def set_stage(request, s, v, form):
        b = queries.block(s, v, request.path_params["block_id"])
        if not v.may_edit_block(b.farm_id):
            raise Forbidden("Only an agent of this farm can change a block's stage.")
        today = dt.datetime.now(ZoneInfo(b.farm.timezone)).date()
        values = {"stage": str(form.get("stage", "")), "stage_date": str(form.get("stage_date", ""))}
        try:
            stage, day = forms.check_stage(b.crop, values["stage"], values["stage_date"], b.t10_override_c,
                                           b.t90_override_c, today)
        except forms.FormError as exc:
            return render(request, "block.html", _block_ctx(request, s, v, b, {exc.field: exc.message}, values),
                          status=400)
        before = (b.stage, b.stage_date)
        record_stage(s, b, stage, day, "web console")
        ct = thresholds.critical_temps(b.crop, b.stage, b.t10_override_c, b.t90_override_c)
        s.add(AuditEntry(username=v.username, farm_id=b.farm_id, block_id=b.id, action="stage",
                         summary=f"stage seen {stage} on {day.isoformat()} (was {before[0]} since "
                                 f"{before[1].isoformat()}); now {b.stage}: T10 {ct.t10_c:.1f} °C, "
                                 f"T90 {ct.t90_c:.1f} °C",
                         detail={"stage": stage, "observed_on": day.isoformat(), "before": before[0],
                                 "before_date": before[1].isoformat(), "t10_c": ct.t10_c, "t90_c": ct.t90_c}))
        log.info("%s set the stage of block %s to %s (%s)", v.username, b.id, stage, day)
        return RedirectResponse(f"/blocks/{b.id}?done=stage", status_code=303)

    # ------------------------------------------------------------------ notices

    @page()
    def notice_page(request, s, v, form):
        from advisory.notices.render import render as render_notice

        n = queries.notice(s, v, request.path_params["notice_id"])
        try:
            text = render_notice(dict(n.full_content), "text")
        except Exception:  # an old or odd notice: show what is stored plainly
            log.exception("notice %s could not be rendered", n.id)
            text = n.subject
        dels = queries.block_notices(s, n.block_id, n.night) if n.block_id else []
        deliveries = next((d for nn, d in dels if nn.id == n.id), [])
        return render(request, "notice.html", {"viewer": v, "n": n, "text": text, "deliveries": deliveries,
                                               "may_edit": v.may_edit_block(n.farm_id)})

    @page()
    def resend(request, s, v, form):
        from advisory.notices import deliver

        n = queries.notice(s, v, request.path_params["notice_id"])
        if not v.may_edit_block(n.farm_id):
            raise Forbidden("Only an agent of this farm can resend its notices.")
        channel = str(form.get("channel", "") or "")
        if channel and channel not in deliver.CHANNELS:
            channel = ""
        if n.block_id is not None:
            recips = list(s.get(Block, n.block_id).recipients)
        else:
            from sqlalchemy import select

            recips = list(s.scalars(select(Recipient).where(Recipient.farm_id == n.farm_id)))
        made = deliver.deliver_notice(s, n, recips, cfg(), channels=[channel] if channel else None, force=True,
                                      retry=deliver.RetryPolicy(attempts=1))
        result = ", ".join(f"{d.channel} {d.status}" for d in made) or "nothing to send"
        s.add(AuditEntry(username=v.username, farm_id=n.farm_id, block_id=n.block_id, action="resend",
                         summary=f"resent notice {n.id} ({n.subject}) by {channel or 'every channel'}: {result}",
                         detail={"notice_id": n.id, "channel": channel or None}))
        back = f"/blocks/{n.block_id}?night={n.night.isoformat()}&done=resend" if n.block_id else f"/notices/{n.id}"
        return RedirectResponse(back, status_code=303)

    # ------------------------------------------------------------------ recipients

    @page()
    def recipient_page(request, s, v, form):
        r = queries.recipient(s, v, request.path_params["recipient_id"])
        if not v.may_edit_recipient(r.farm_id):
            raise Forbidden("You cannot change this recipient.")
        ctx = {"viewer": v, "r": r, "errors": {}, "values": dict(r.channels or {}),
               "done": request.query_params.get("done"), "channels": forms.CHANNELS,
               "back": _int(request.query_params.get("block")),
               "audit": [a for a in queries.audit(s, farm_id=r.farm_id, limit=200)
                         if a.action == "recipient" and a.detail.get("recipient_id") == r.id][:20]}
        if request.method == "GET":
            return render(request, "recipient.html", ctx)
        values = {ch: str(form.get(ch, "") or "") for ch in forms.CHANNELS}
        try:
            channels = forms.check_channels(values)
        except forms.FormError as exc:
            return render(request, "recipient.html", {**ctx, "errors": {exc.field: exc.message},
                                                      "values": values}, status=400)
        before = dict(r.channels or {})
        if channels != before:
            r.channels = channels
            changed = sorted(k for k in set(before) | set(channels) if before.get(k) != channels.get(k))
            s.add(AuditEntry(username=v.username, farm_id=r.farm_id, block_id=None, action="recipient",
                             summary=f"{r.name}: channels changed ({', '.join(changed)})",
                             detail={"recipient_id": r.id, "before": before, "after": channels}))
            for blk in r.blocks:  # shown on each of the recipient's blocks too
                s.add(AuditEntry(username=v.username, farm_id=r.farm_id, block_id=blk.id, action="recipient",
                                 summary=f"{r.name}: channels changed ({', '.join(changed)})",
                                 detail={"recipient_id": r.id, "before": before, "after": channels}))
        return RedirectResponse(f"/recipients/{r.id}?done=saved", status_code=303)

    # ------------------------------------------------------------------ station and skill

    @page()
    def station_page(request, s, v, form):
        st = queries.station(s, v, request.path_params["station_id"])
        view = queries.station_view(s, st.id)
        units = st.farm.units
        chart = ""
        if len(view.window) >= 2:
            chart = svg.time_chart(
                title=f"{st.code}: the last three days of readings", unit=display.unit(units), tz=st.timezone,
                series=[{"label": "air", "colour": svg.LINE,
                         "points": [(o.time_utc, _tv(o.air_temp_c, units)) for o in view.window]},
                        {"label": "dew point", "colour": svg.SECOND, "dash": "5 3",
                         "points": [(o.time_utc, _tv(o.dew_point_c, units)) for o in view.window]}],
                width=720, height=300)
        _b, stations, _rel, _all = queries.skill(s, v, "frost", station_id=st.id)
        return render(request, "station.html", {"viewer": v, "st": st, "view": view, "chart": chart,
                                                "blocks": queries.station_blocks(s, st.id),
                                                "skill": stations[0][1] if stations else None})

    @page()
    def skill_page(request, s, v, form):
        kind = "heat" if request.query_params.get("kind") == "heat" else "frost"
        blocks, stations, rel, overall = queries.skill(s, v, kind)
        return render(request, "skill.html", {"viewer": v, "kind": kind,
                                              "blocks_rows": [(sk.name, sk) for sk in blocks],
                                              "stations_rows": [(sk.name, sk) for _, sk in stations],
                                              "overall": overall, "reliability": rel,
                                              "chart": svg.reliability_chart(rel) if kind == "frost" else ""})

    # ------------------------------------------------------------------ errors

    async def not_found(request: Request, exc: HTTPException):
        if exc.status_code == 404:
            return error_page(request, 404, "Not found", "There is nothing here, or nothing you have access to.")
        return error_page(request, exc.status_code, "Request refused", str(exc.detail))

    async def server_error(request: Request, exc: Exception):
        log.error("internal error on %s %s", request.method, request.url.path, exc_info=exc)
        return error_page(request, 500, "Something went wrong",
                          "The console hit an internal error; it has been logged on the server. "
                          "Try again, and tell the person who runs the console if it persists.")

    routes = [
        Route("/login", login_page, methods=["GET", "POST"]),
        Route("/logout", logout, methods=["POST"]),
        Route("/", tonight),
        Route("/heat", heat_day),
        Route("/blocks/{block_id:int}", block_page),
        Route("/blocks/{block_id:int}/stage", set_stage, methods=["POST"]),
        Route("/notices/{notice_id:int}", notice_page),
        Route("/notices/{notice_id:int}/resend", resend, methods=["POST"]),
        Route("/recipients/{recipient_id:int}", recipient_page, methods=["GET", "POST"]),
        Route("/stations/{station_id:int}", station_page),
        Route("/skill", skill_page),
        Mount("/static", StaticFiles(directory=HERE / "static"), name="static"),
    ]
    middleware = [Middleware(SessionMiddleware, secret_key=secret or auth.signing_secret(),
                             session_cookie="advisory_session", max_age=SESSION_HOURS * 3600,
                             same_site="lax", https_only=https_only)]
    app = Starlette(routes=routes, middleware=middleware,
                    exception_handlers={HTTPException: not_found, Exception: server_error})
    app.state.db = db
    return app


def _int(text) -> int | None:
    try:
        return int(text)
    except (TypeError, ValueError):
        return None


def _tv(v, units):
    return None if v is None else display.temp_value(v, units)


def _night_chart(b: Block, payload: dict, ct, units: str, tz: str) -> str:
    pts = payload.get("curve") or []

    def t(p):
        return dt.datetime.fromisoformat(p["time_utc"])

    band = {"label": "8 in 10 range", "points": [(t(p), _tv(p.get("p10_c"), units), _tv(p.get("p90_c"), units))
                                                  for p in pts]}
    series = [{"label": "middle forecast", "points": [(t(p), _tv(p.get("p50_c"), units)) for p in pts]}]
    heat = payload.get("kind") == "heat"
    if not heat and any(p.get("wet_bulb_c") is not None for p in pts):
        series.append({"label": "wet bulb", "colour": svg.SECOND, "dash": "5 3",
                       "points": [(t(p), _tv(p.get("wet_bulb_c"), units)) for p in pts]})
    hlines = []
    if ct is not None and not heat:
        hlines = [{"label": f"T10 {display.temp(ct.t10_c, units)} ({ct.stage})", "value": _tv(ct.t10_c, units),
                   "colour": svg.T10},
                  {"label": f"T90 {display.temp(ct.t90_c, units)}", "value": _tv(ct.t90_c, units),
                   "colour": svg.T90, "dash": "2 3"}]
    vlines = []
    starts = sorted(st.get("start_utc") for st in payload.get("plan") or [] if st.get("advised") and st.get("start_utc"))
    if starts:
        vlines.append({"label": "start", "time": dt.datetime.fromisoformat(starts[0])})
    return svg.time_chart(title=f"{b.name}: the night's hourly forecast", unit=display.unit(units), tz=tz,
                          series=series, band=band, hlines=hlines, vlines=vlines, width=720, height=320)
