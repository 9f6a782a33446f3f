"""The page: ``/`` (the HTML with its config element) and plotly.js from the installed package."""

import os

from flask import Blueprint, current_app, render_template, send_file

from webapp import __version__

from .db import state
from .errors import ApiError

__all__ = ["bp", "page_config"]

bp = Blueprint("page", __name__, template_folder="templates")


def page_config():
    """What the page reads from ``<script id="rateferry-config" type="application/json">``."""
    from .api import URLS
    return dict(version=__version__, token=current_app.config["PAGE_TOKEN"],
                demo_recording_id=state().demo_id, demo_pair=state().demo_pair,
                urls=dict(URLS),
                max_upload_bytes=current_app.config["MAX_CONTENT_LENGTH"],
                excerpt_max_s=current_app.config["EXCERPT_MAX_S"])


@bp.get("/")
def index():
    # the template reads ``config`` (this page's config, shadowing Flask's app config there)
    config = page_config()
    response = current_app.make_response(render_template("index.html", config=config,
                                                         rateferry_config=config))
    response.headers["Cache-Control"] = "no-store"  # the token changes with every start
    return response


@bp.get("/static/vendor/plotly.min.js")
def plotly_js():
    path = current_app.config["PLOTLY_JS"]
    if not os.path.isfile(path):
        raise ApiError(404, "plotly.min.js is missing from the installed plotly package", "plotly")
    return send_file(path, mimetype="text/javascript", conditional=True, max_age=3600)
