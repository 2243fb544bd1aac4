"""Shared HTML machinery of the reports (the scan report and the compare page).

Every page of the tool is one self-contained HTML file: figures are embedded as
``data:`` URIs (:func:`data_uri`), the stylesheet is inline in
``templates/base.html.j2``, and the page declares a Content-Security-Policy that
allows no script and no network at all, so it opens the same in any browser, offline.

How a page is made:

- A template extends ``base.html.j2`` and fills its blocks ``title``, ``masthead``,
  ``nav``, ``content`` and ``footer``; ``macros.html.j2`` holds the shared pieces
  (``figure``, ``chip``, ``kv_table``, ``missing``), imported with
  ``{% import "macros.html.j2" as m %}``.
- :func:`render` renders a template by name with :func:`environment`, which has
  autoescaping on for every template (every class name, file name and label from the
  data is escaped) and fails on an undefined variable instead of printing nothing.
- The filters ``pct``, ``num``, ``pval``, ``data_uri`` and ``where`` format numbers,
  embed bytes and name a region, the same way on every page.

Rendering is pure: the same context gives the same text (no clock is read).

Examples
--------
>>> data_uri(b"\\x89PNG")[:22]
'data:image/png;base64,'
>>> "&lt;b&gt;" in render_string("{{ x }}", x="<b>")
True
"""

from __future__ import annotations

import base64
from functools import lru_cache
from pathlib import Path

import jinja2

from .figures import heat_stops
from .words import num, pct, pval, where

__all__ = ["TEMPLATES", "data_uri", "environment", "render", "render_string", "heat_gradient"]

#: The folder of the page templates.
TEMPLATES = Path(__file__).parent / "templates"


def data_uri(data: bytes, mime: str = "image/png") -> str:
    """``data`` as a ``data:`` URI (base64), for an ``<img src>`` that needs no file."""
    return f"data:{mime};base64," + base64.b64encode(bytes(data)).decode("ascii")


def heat_gradient() -> str:
    """A CSS ``linear-gradient`` of the heatmap colormap, low (left) to high (right)."""
    return "linear-gradient(to right, " + ", ".join(heat_stops(9)) + ")"


@lru_cache(maxsize=1)
def environment() -> jinja2.Environment:
    """The Jinja environment of every page: templates from :data:`TEMPLATES`,
    autoescaping on, strict undefined variables, the shared filters."""
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(TEMPLATES)),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )
    env.filters.update(pct=pct, num=num, pval=pval, data_uri=data_uri, where=where)
    env.globals.update(heat_gradient=heat_gradient())
    return env


def render(template: str, **context) -> str:
    """Render the template named ``template`` (in :data:`TEMPLATES`) with ``context``."""
    return environment().get_template(template).render(**context)


def render_string(source: str, **context) -> str:
    """Render template text ``source`` with the shared environment (autoescaped)."""
    return environment().from_string(source).render(**context)
