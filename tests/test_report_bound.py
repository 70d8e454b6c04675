"""The summary's words on a loose relaxation bound."""

import dataclasses
import io
import math

import numpy as np
from result_builders import make_result
from rich.console import Console

from probeplan import report


def _summary(value: float, bound: float) -> str:
    r = make_result(np.random.default_rng(3), budget=False, singular=False)
    score = dataclasses.replace(r.score, criterion="d", value=value)
    r = dataclasses.replace(
        r, score=score, search=dataclasses.replace(r.search, bound=bound), changes=None
    )
    out = io.StringIO()
    report.print_result(r, Console(file=out, width=100, highlight=False))
    return out.getvalue()


def test_a_wide_gap_to_the_bound_is_explained_in_words():
    n = len(make_result(np.random.default_rng(3), budget=False, singular=False).score.names)
    # D-efficiency exp(-Δ/n): a gap of n·ln(2) is 50 %, one of n·ln(1/0.99) is 99 %.
    wide = _summary(-10.0, -10.0 + n * math.log(2.0))
    assert "50.0 % of the bound" in wide
    assert "loose bound, not a poor plan" in wide
    close = _summary(-10.0, -10.0 + n * math.log(1 / 0.99))
    assert "99.0 % of the bound" in close
    assert "loose bound" not in close
