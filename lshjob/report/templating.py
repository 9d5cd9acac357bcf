"""The pages' Jinja2 templates (``lshjob/report/templates/``, read through ``importlib.resources``
so an installed copy finds them), with HTML escaping on for every value; a fragment built
here (a figure's SVG, a table whose cells were escaped) is passed through :func:`markup`.
"""

from __future__ import annotations

from importlib import resources


def render(name: str, **values) -> str:
    """The template ``name`` filled with ``values``; an unknown name in the template is an error."""
    import jinja2

    folder = resources.files("lshjob.report").joinpath("templates")
    env = jinja2.Environment(loader=jinja2.FunctionLoader(lambda n: folder.joinpath(n).read_text(encoding="utf-8")),
                             autoescape=True, undefined=jinja2.StrictUndefined, keep_trailing_newline=True)
    return env.get_template(name).render(**values)


def markup(html: str):
    """``html`` marked as already safe (built from escaped parts)."""
    import markupsafe

    return markupsafe.Markup(html)
