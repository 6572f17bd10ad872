"""Jinja2 rendering with autoescaping on for every template.

Templates are package data (``plumbwatch/web/templates``); they never mark user
text safe. SVG from the chart modules arrives as ``Markup`` built with escaped
text (see ``plumbwatch.web.svg``).
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any

from jinja2 import Environment, PackageLoader, StrictUndefined

from plumbwatch import __version__
from plumbwatch.web import fmt

CAUTIONS = (
    "Models watched here may drive decisions about people (credit, claims, health). "
    "Calibration monitoring is one statistical control: it is not a fairness audit, a "
    "regulatory validation or a substitute for your organisation's model-risk governance, "
    "and it does not replace the judgement of licensed practitioners. Follow local law "
    "and your governance process for any decision taken on a model's output."
)
READING_NOTES = (
    "Figures cover matured cohorts only (predictions past their label horizon); younger "
    "cohorts show label coverage and score drift, never calibration. Pages show the latest "
    "evaluation; a page reload does not run one."
)


@lru_cache(maxsize=1)
def environment() -> Environment:
    env = Environment(
        loader=PackageLoader("plumbwatch.web", "templates"),
        autoescape=True,
        undefined=StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.globals.update(cautions=CAUTIONS, reading_notes=READING_NOTES, version=__version__)
    env.filters.update(slice_label=fmt.slice_label, when=fmt.when, number=fmt.number)
    return env


def compile_all() -> int:
    """Compile every template now (a first page view would otherwise pay for it)."""
    env = environment()
    names = env.list_templates(filter_func=lambda name: name.endswith(".html"))
    for name in names:
        env.get_template(name)
    return len(names)


def render(template: str, **context: Any) -> str:
    return environment().get_template(template).render(**context)
