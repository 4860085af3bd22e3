"""kinscope's browser page and JSON API: a Flask app factory over index.api.Archive."""
from __future__ import annotations

from pathlib import Path

from flask import Flask

from . import access, archive_access


def create_app(test_config: dict | None = None) -> Flask:
    """Build the app. Config: KINSCOPE_DB (required), KINSCOPE_TOKEN (optional access token),
    MAX_CONTENT_LENGTH (upload limit), QUERY_CACHE (how many uploaded queries are kept)."""
    app = Flask(__name__, instance_relative_config=False)
    app.config.from_mapping(
        KINSCOPE_DB=None,
        KINSCOPE_TOKEN=None,
        MAX_CONTENT_LENGTH=32 * 1024 * 1024,
        MAX_UPLOAD_PIXELS=60_000_000,
        QUERY_CACHE=64,
        JSON_SORT_KEYS=False,
    )
    if test_config:
        app.config.update(test_config)
    if not app.config["KINSCOPE_DB"]:
        raise ValueError("KINSCOPE_DB must name an archive folder")
    app.config["KINSCOPE_DB"] = str(Path(app.config["KINSCOPE_DB"]))

    archive_access.init_app(app)
    access.init_app(app)

    from . import api, duplicates, media, pages

    app.register_blueprint(pages.bp)
    app.register_blueprint(api.bp)
    app.register_blueprint(media.bp)
    app.register_blueprint(duplicates.bp)
    return app
