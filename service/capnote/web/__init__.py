"""The clinician's note form: one HTML page and its static assets (no build step).

The page is plain HTML with external CSS and ES-module JavaScript only, because the service's
Content-Security-Policy (default-src 'self') refuses inline scripts and styles.
"""

from __future__ import annotations

from pathlib import Path

PAGE = Path(__file__).resolve().parent / "index.html"
AUDIT_PAGE = Path(__file__).resolve().parent / "audit.html"
STATIC = Path(__file__).resolve().parent / "static"
