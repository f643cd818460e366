"""Every text renderer has one signature: ``render(result, *, width=None, colour=False, show=None)``."""

from __future__ import annotations

import importlib
import inspect

import pytest

RENDERERS = ["text", "text_check", "text_compare", "text_instruments", "text_explain"]


@pytest.mark.parametrize("module", RENDERERS)
def test_every_text_renderer_has_the_common_signature(module) -> None:
    render = importlib.import_module(f"auditor.render.{module}").render
    params = list(inspect.signature(render).parameters.values())
    first, rest = params[0], params[1:]
    assert first.kind is inspect.Parameter.POSITIONAL_OR_KEYWORD
    assert [(p.name, p.kind, p.default) for p in rest] == [
        ("width", inspect.Parameter.KEYWORD_ONLY, None),
        ("colour", inspect.Parameter.KEYWORD_ONLY, False),
        ("show", inspect.Parameter.KEYWORD_ONLY, None),
    ]


def test_explain_renders_every_code_or_one_at_the_width_asked() -> None:
    from auditor.checks.findings import CHECKS
    from auditor.render.text_explain import render

    every = render(width=80)
    assert all(code in every for code in CHECKS)
    one = render("gaps", width=60)
    assert one.startswith("gaps") and all(len(line) <= 60 for line in one.splitlines())
