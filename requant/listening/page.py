"""The listening page: one self-contained HTML file, figures passed as escaped data."""

import json
from urllib.parse import quote

__all__ = ["render_page"]


def _fmt(v, spec=".1f", none="n/a"):
    return none if v is None else format(v, spec)


def render_page(kit):
    """The listening page for a kit's figures, as HTML text.

    Every value goes through jinja2 with autoescaping; the figures reach the
    page's script only through an escaped ``data-`` attribute, never as
    script text.
    """
    import jinja2

    env = jinja2.Environment(loader=jinja2.PackageLoader("requant.listening", "templates"),
                             autoescape=True,
                             undefined=jinja2.StrictUndefined, trim_blocks=True,
                             lstrip_blocks=True)
    env.filters["num"] = _fmt
    env.filters["url"] = lambda name: quote(name)
    template = env.get_template("listen.html.j2")
    kit_json = json.dumps(kit, allow_nan=False, ensure_ascii=True, separators=(",", ":"))
    return template.render(kit=kit, kit_json=kit_json)


