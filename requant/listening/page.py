"""The listening page: one self-contained HTML file, figures passed as escaped data."""

import copy
import json
from urllib.parse import quote

__all__ = ["render_page", "page_data", "level_note", "JS_SAFE_INTEGER"]

#: Largest integer a JavaScript number holds exactly (2**53 - 1); larger ones reach the
#: page's script as decimal strings.
JS_SAFE_INTEGER = 2**53 - 1


def _fmt(v, spec=".1f", none="n/a"):
    return none if v is None else format(v, spec)


def _exact_for_js(obj):
    """``obj`` with every integer beyond :data:`JS_SAFE_INTEGER` as a decimal string."""
    if isinstance(obj, dict):
        return {k: _exact_for_js(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_exact_for_js(v) for v in obj]
    if isinstance(obj, int) and not isinstance(obj, bool) and abs(obj) > JS_SAFE_INTEGER:
        return str(obj)
    return obj


def level_note(comparison, row, players):
    """What a player's button says about its level, before it plays.

    Parameters
    ----------
    comparison : dict
        One of the kit's comparisons.
    row : dict
        One of its ``players`` rows (:func:`~requant.listening.levels.plan_levels`).
    players : dict
        The kit's players, by id.

    Returns
    -------
    (str, bool)
        The note, and whether it is a warning (a level difference the
        listener should know of before pressing play).
    """
    unit = "LUFS" if comparison["measure"] == "LUFS" else "dBFS RMS"
    ref = comparison["players"][0]
    ref_label = players[ref["player"]]["label"]
    if row["state"] == "silent":
        return "digital silence", True
    level = f"{row['level']:.1f} {unit}"
    gain, diff = row["gain_db"], row["difference_db"]
    if row["state"] == "stated":
        if diff is None:
            return f"{level}; the switch fades", True
        if abs(diff) < 0.05:
            return f"{level}, as loud as {ref_label}", False
        word = "louder" if diff > 0 else "quieter"
        return (f"this one is {abs(diff):.1f} dB {word} than {ref_label} ({level}); "
                "the switch fades", True)
    played = "" if gain == 0 else f" as written, plays {-gain:.1f} dB quieter"
    if row is ref:
        return f"{level}{played}: the reference", False
    return f"{level}{played}: matched ({diff:+.2f} dB)", False


def page_data(kit):
    """The figures as the page's script reads them.

    The seed is a decimal string (JavaScript numbers lose digits past
    2**53), as is any other integer beyond :data:`JS_SAFE_INTEGER`; each
    comparison's player rows carry their :func:`level_note` (``note``,
    ``warn``).
    """
    data = copy.deepcopy(kit)
    for comp in data["comparisons"]:
        for row in comp["players"]:
            row["note"], row["warn"] = level_note(comp, row, data["players"])
    data = _exact_for_js(data)
    data["seed"] = str(kit["seed"])
    return data


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
    data = page_data(kit)
    kit_json = json.dumps(data, allow_nan=False, ensure_ascii=True, separators=(",", ":"))
    return template.render(kit=data, kit_json=kit_json)
