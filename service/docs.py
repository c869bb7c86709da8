"""The API explorer at /docs, served from the Swagger UI files the `swagger-ui-bundle-v2` package installs: the page
loads nothing from another host, so it works on a line PC without internet access."""

from __future__ import annotations

from fastapi import FastAPI
from fastapi.openapi.docs import get_swagger_ui_html
from fastapi.responses import HTMLResponse
from fastapi.staticfiles import StaticFiles
from swagger_ui_bundle import swagger_ui_path

ASSETS = "/docs-assets"


def install(app: FastAPI) -> None:
    """Adds /docs and its assets; create the app with `docs_url=None` (FastAPI's own page loads them from a CDN)."""
    app.mount(ASSETS, StaticFiles(directory=str(swagger_ui_path)), name="docs-assets")

    @app.get("/docs", include_in_schema=False)
    async def docs() -> HTMLResponse:
        return get_swagger_ui_html(
            openapi_url=app.openapi_url,
            title=f"{app.title} API",
            swagger_js_url=f"{ASSETS}/swagger-ui-bundle.js",
            swagger_css_url=f"{ASSETS}/swagger-ui.css",
            swagger_favicon_url=f"{ASSETS}/favicon-32x32.png",
            swagger_ui_parameters={"validatorUrl": None},  # no validator badge fetched from an online service
        )
