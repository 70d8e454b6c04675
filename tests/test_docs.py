"""The README's promises about the configs hold: every key it lists appears in configs/, and
every commented example there is a valid config once uncommented (the example sites are
fictional)."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

from probeplan.config import parse_config
from probeplan.problem import build_problem

REPO = Path(__file__).resolve().parents[1]
CONFIGS = REPO / "configs"
TOMLS = sorted(CONFIGS.glob("*.toml"))


def readme_keys() -> tuple[set[str], set[str]]:
    """(table headers, keys) of the README's config table: bare `key` tokens are keys,
    quoted `"value"` tokens are allowed values."""
    text = (REPO / "README.md").read_text()
    start = text.index("| table | keys |")
    rows = []
    for line in text[start:].splitlines()[2:]:
        if not line.startswith("|"):
            break
        rows.append(line.split("|")[1:3])
    tables = {t for head, _ in rows for t in re.findall(r"`(\[\[?[\w.]+\]\]?)`", head)}
    keys = {k for _, cell in rows for k in re.findall(r"`([a-z_][a-z0-9_]*)`", cell)}
    return tables, keys


def config_texts() -> str:
    return "\n".join(p.read_text() for p in TOMLS)


def test_the_readme_lists_the_keys_its_issue_found_missing():
    _, keys = readme_keys()
    # The keys that once had no example in configs/ (issue 15, item 15) are listed.
    for key in (
        "density_path",
        "origin_m",
        "spacing_m",
        "tolerate_failures",
        "grid_spacing_m",
        "random_layouts",
        "radius_range_m",
        "gain",
        "field_range_v_per_m",
    ):
        assert key in keys, key
    assert len(keys) > 40  # the table was read, not an empty match


def test_every_key_the_readme_lists_appears_in_configs():
    tables, keys = readme_keys()
    text = config_texts()
    missing = [k for k in sorted(keys) if not re.search(rf"^[ \t]*#?[ \t]*{k}[ \t]*=", text, re.M)]
    assert not missing, f"README keys with no example in configs/: {missing}"
    missing = [
        t for t in sorted(tables) if not re.search(rf"^[ \t]*#?[ \t]*{re.escape(t)}", text, re.M)
    ]
    assert not missing, f"README tables with no example in configs/: {missing}"


def commented_examples(text: str) -> list[tuple[int, int]]:
    """Line spans ``[start, end)`` of the commented examples: a commented table (``# [[x]]``
    and the commented keys after it) or one commented ``# key = value`` line."""
    lines = text.splitlines()
    spans, k = [], 0
    while k < len(lines):
        line = lines[k]
        if re.match(r"# \[\[?[\w.]+\]\]?", line):
            end = k + 1
            while end < len(lines) and re.match(r"# \w+ = ", lines[end]):
                end += 1
            spans.append((k, end))
            k = end
            continue
        if re.match(r"# \w+ = ", line):
            spans.append((k, k + 1))
        k += 1
    return spans


def uncomment(text: str, span: tuple[int, int]) -> str:
    lines = text.splitlines()
    for k in range(*span):
        lines[k] = lines[k][2:]
    return "\n".join(lines) + "\n"


EXAMPLES = [
    pytest.param(path, span, id=f"{path.name}:{span[0] + 1}")
    for path in TOMLS
    for span in commented_examples(path.read_text())
]


def test_there_are_commented_examples():
    assert len(EXAMPLES) >= 8


@pytest.mark.parametrize(("path", "span"), EXAMPLES)
def test_every_commented_example_is_a_valid_config(path, span):
    text = uncomment(path.read_text(), span)
    parse_config(text, path)  # raises InputError with the key if the example is wrong


def test_the_gridded_density_example_plans():
    path = CONFIGS / "indoor_powder.toml"
    text = path.read_text()
    (span,) = [
        s for s in commented_examples(text) if 'kind = "grid"' in text.splitlines()[s[0] + 1]
    ]
    cfg = parse_config(uncomment(text, span), path)
    grid = cfg.sources[-1].source
    assert grid.kind == "grid"
    density = np.load(CONFIGS / "indoor_powder_hopper.npy")
    assert density.ndim == 3 and density.nbytes < 4096  # small, shipped with the repo
    # Its total charge is the sum of cell densities times the cell volume (0.5 m cubes).
    assert grid.charge_c == pytest.approx(density.sum() * 0.5**3, rel=1e-12)
    pr = build_problem(cfg)
    assert "s2.charge_c" in pr.names
    score = pr.score(pr.site.regular_layout(pr.count))
    assert np.isfinite(score.value)
