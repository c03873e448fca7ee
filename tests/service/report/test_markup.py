"""The report's building blocks: escaping by default, and axis ticks that read well."""

from __future__ import annotations

import itertools
import math

import pytest

from service.report.charts import nice_ticks, padded_range
from service.report.markup import Markup, element, escape


def test_text_and_attributes_are_escaped_unless_already_markup() -> None:
    hostile = '"><script>alert(1)</script>'
    built = element("p", {"title": hostile, "hidden": True, "data-x": None}, hostile, element("b", None, "ok"))
    assert built == ('<p title="&quot;&gt;&lt;script&gt;alert(1)&lt;/script&gt;" hidden>'
                     "&quot;&gt;&lt;script&gt;alert(1)&lt;/script&gt;<b>ok</b></p>")
    assert escape(Markup("<i>kept</i>")) == "<i>kept</i>"
    assert element("td", None, ["a&b", 3, None, 2.5]) == "<td>a&amp;b32.5</td>"


@pytest.mark.parametrize(("lo", "hi"), [(0.0, 1.0), (48.3, 57.9), (-0.02, 0.013), (1e-6, 3e-6), (-250.0, 900.0)])
def test_ticks_are_round_evenly_spaced_and_inside_the_range(lo: float, hi: float) -> None:
    ticks = nice_ticks(lo, hi)
    assert 2 <= len(ticks) <= 11
    assert all(lo - 1e-12 <= t <= hi + 1e-12 for t in ticks)
    steps = {round(b - a, 12) for a, b in itertools.pairwise(ticks)}
    assert len({round(s / max(steps), 6) for s in steps}) == 1  # one step size
    step = max(steps)
    mantissa = step / 10 ** math.floor(math.log10(step))
    assert round(mantissa, 6) in (1.0, 2.0, 5.0)


def test_a_constant_series_still_gets_a_range() -> None:
    assert padded_range([3.0, 3.0]) == (2.7, 3.3)
    assert padded_range([0.0]) == (-1.0, 1.0)
