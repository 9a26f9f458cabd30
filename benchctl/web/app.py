"""The Flask application of the lab web view (see :mod:`benchctl.web`).

Routes (GET only; anything else is answered 405 by Flask)::

    /                         stations and their latest runs, runs in progress, revisions
    /runs/<id>                a run: status, live progress while it runs, plots, results, events
    /api/runs/<id>/progress   the small JSON the run page polls
    /revision?part=&rev=      a revision's summary (the page of ``benchctl revision``)
    /trend?part=&quantity=&point=        a quantity across revisions and serials
    /trend.png?part=&quantity=&point=    its plot
    /jobs                     the pass/fail history of the jobs
"""

from __future__ import annotations

import logging
from collections.abc import Iterable
from pathlib import Path
from typing import Any
from urllib.parse import urlencode

from flask import Flask, Response, abort, jsonify, make_response, redirect, render_template, request
from markupsafe import Markup

from benchctl.errors import BenchctlError, StoreError

from . import views
from .access import COOKIE_NAME, token_matches

log = logging.getLogger(__name__)

#: How often the run page asks for progress (ms).
POLL_MS = 700

_SECURITY_HEADERS = {
    # nothing but our own script and styles; images are our PNGs as data: URIs
    "Content-Security-Policy": "default-src 'none'; script-src 'self'; style-src 'self' 'unsafe-inline'; "
                               "img-src 'self' data:; connect-src 'self'; base-uri 'none'; form-action 'self'; "
                               "frame-ancestors 'none'",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "X-Frame-Options": "DENY",
    "Cache-Control": "no-store",
}


def create_app(store: Any, *, token: str | None = None, limits: Iterable[str | Path] = ()) -> Flask:
    """The web view over ``store`` (opened read-only by the caller). With ``token`` every
    request must present it (:mod:`benchctl.web.access`); ``limits`` are the limits files the
    revision pages check against."""
    from benchctl.limits import load_limits
    from benchctl.report.html import _CSS

    app = Flask(__name__, template_folder="templates", static_folder="static")
    app.config["MAX_CONTENT_LENGTH"] = 1024  # nothing is ever uploaded
    limits_files = tuple(load_limits(p) for p in limits)
    plots = views.PlotCache()
    css = Markup(_CSS)  # our own constant style sheet

    @app.context_processor
    def _common() -> dict[str, Any]:
        return {"css": css, "store_url": store.url, "poll_ms": POLL_MS}

    @app.before_request
    def _access() -> Any:
        if token is None:
            return None
        given = request.args.get("token")
        if given is not None:
            if not token_matches(token, given):
                return _denied()
            args = {k: v for k, v in request.args.items() if k != "token"}
            target = request.path + (("?" + urlencode(args)) if args else "")
            resp = redirect(target, code=303)
            resp.set_cookie(COOKIE_NAME, token, httponly=True, samesite="Strict", secure=request.is_secure)
            return resp
        auth = request.headers.get("Authorization", "")
        if auth.startswith("Bearer ") and token_matches(token, auth[7:].strip()):
            return None
        if token_matches(token, request.cookies.get(COOKIE_NAME)):
            return None
        return _denied()

    @app.after_request
    def _headers(resp: Response) -> Response:
        for k, v in _SECURITY_HEADERS.items():
            resp.headers.setdefault(k, v)
        return resp

    @app.errorhandler(BenchctlError)
    def _store_error(exc: BenchctlError) -> Any:
        return render_template("error.html", title="Not found", message=str(exc)), 404

    @app.get("/")
    def index() -> Any:
        return render_template("index.html", title="Stations", **views.stations_overview(store))

    @app.get("/runs/<int:run_id>")
    def run(run_id: int) -> Any:
        return render_template("run.html", title=f"Run {run_id}", **views.run_page(store, run_id, plots))

    @app.get("/api/runs/<int:run_id>/progress")
    def progress(run_id: int) -> Any:
        return jsonify(views.run_progress(store, run_id))

    @app.get("/revision")
    def revision() -> Any:
        from benchctl.report.revision import render_revision_page, revision_images
        from benchctl.report.revision_data import revision_evidence

        part, rev = request.args.get("part", ""), request.args.get("rev", "")
        if not part:
            abort(404)
        ev = revision_evidence(store, part, rev, limits=limits_files)
        if ev.runs.runs.empty:
            raise StoreError(f"no run of {part} revision {rev!r} in this store")
        with views.RENDER_LOCK:
            images = revision_images(ev)
        page = render_revision_page(ev, images, store_url=store.url)
        nav = render_template("nav.html")
        return page.replace("<main>", "<main>" + nav, 1)  # our own page, already escaped

    @app.get("/trend")
    def trend() -> Any:
        part = request.args.get("part", "")
        quantity = request.args.get("quantity", "")
        point = request.args.get("point", "")
        parts = sorted({r["part"] for r in views.stations_overview(store)["revisions"]})
        quantities = views.trend_quantities(store, part) if part else []
        frame = views.trend_values(store, part, quantity) if part and quantity else None
        points = views.points_of(frame) if frame is not None and not frame.empty else []
        if points and point not in points:
            point = points[0]
        shown = frame[frame["point"] == point] if frame is not None and point else frame
        return render_template("trend.html", title="Trend", parts=parts, part=part, quantities=quantities,
                               quantity=quantity, points=points, point=point,
                               rows=[] if shown is None else shown.to_dict("records"),
                               table=[] if shown is None else views.trend_table(shown),
                               plot_query=urlencode({"part": part, "quantity": quantity, "point": point}))

    @app.get("/trend.png")
    def trend_png() -> Any:
        part, quantity = request.args.get("part", ""), request.args.get("quantity", "")
        frame = views.trend_values(store, part, quantity)
        if frame.empty:
            abort(404)
        resp = make_response(views.trend_png(frame, quantity, request.args.get("point", "")))
        resp.headers["Content-Type"] = "image/png"
        return resp

    @app.get("/jobs")
    def jobs() -> Any:
        return render_template("jobs.html", title="Jobs", jobs=views.job_history(store))

    return app


def _denied() -> Any:
    return render_template("error.html", title="Access token needed",
                           message="This lab view needs its access token: open it once with ?token=... "
                                   "(ask whoever runs `benchctl serve`)."), 401


__all__ = ["POLL_MS", "create_app"]
