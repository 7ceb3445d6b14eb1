"""The review page: one HTML file with its CSS and JavaScript, no build step.

The page holds no data; it calls the JSON API (with the API key when it has one) for
everything it shows. Its Content-Security-Policy allows only this server's own scripts,
styles and images (and blob: images, which is how it shows thumbnails fetched with a key).
"""

from __future__ import annotations

from pathlib import Path

from flask import Blueprint, send_file

review = Blueprint("review", __name__)

PAGE = Path(__file__).resolve().parent / "templates" / "review.html"
CSP = ("default-src 'self'; img-src 'self' blob: data:; style-src 'self'; script-src 'self'; "
       "connect-src 'self'; frame-ancestors 'none'; base-uri 'none'; form-action 'self'")


@review.get("/")
def page():
    response = send_file(PAGE, mimetype="text/html", max_age=0)
    response.headers["Content-Security-Policy"] = CSP
    response.headers["X-Frame-Options"] = "DENY"
    return response
