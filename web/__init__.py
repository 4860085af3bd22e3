"""kinscope's browser page and JSON API: a Flask app factory over index.api.Archive."""
from __future__ import annotations

from pathlib import Path

from flask import Flask

from . import access, archive_access


def create_app(test_config: dict | None = None) -> Flask:
    """Build the app. Config: KINSCOPE_DB (required), KINSCOPE_TOKEN (optional access token),
    KINSCOPE_LISTEN and KINSCOPE_PORT (the address and port it serves on: Host headers must name them
    or a loopback name; no port accepts any), KINSCOPE_ALLOW_HOSTS (more names it answers to),
    MAX_CONTENT_LENGTH and MAX_UPLOAD_PIXELS (upload limits), QUERY_CACHE and QUERY_CACHE_BYTES (how
    many uploaded queries are kept, and how many bytes they may take)."""
    app = Flask(__name__, instance_relative_config=False)
    app.config.from_mapping(
        KINSCOPE_DB=None,
        KINSCOPE_TOKEN=None,
        KINSCOPE_LISTEN="127.0.0.1",
        KINSCOPE_PORT=None,
        KINSCOPE_ALLOW_HOSTS=(),
        MAX_CONTENT_LENGTH=32 * 1024 * 1024,
        MAX_UPLOAD_PIXELS=60_000_000,
        QUERY_CACHE=64,
        QUERY_CACHE_BYTES=64 * 1024 * 1024,
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
    from .map import bp as map_bp  # the collection map: page, /api/map

    app.register_blueprint(map_bp)
    return app
