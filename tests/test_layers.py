"""The import rule of DEVELOPERS.md: a module imports only from the modules above it in the
file table (or from its own package), never from one below it, not even inside a function.

The order is read from the table itself, so the rule and its documentation cannot drift apart:
a new module needs its row there. A package (``probeplan/site/``) takes its row's place, and
all its modules count as that stage.
"""

from __future__ import annotations

import ast
import re
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
PACKAGE = REPO / "probeplan"

#: Modules being split out of a stage's module in parallel work: the stage they belong to,
#: used until the table gives them a row of their own.
ALIASES: dict[str, str] = {"reruns": "cli", "commands": "cli"}

#: The package root (the public names) and ``python -m probeplan``: below every row, so any
#: module may be imported by them and none may import them.
FACADE = "<package root>"

_ROW = re.compile(r"^\|\s*`probeplan/([A-Za-z_]\w*)(?:\.py|/)?`\s*\|")


def table_order(text: str) -> list[str]:
    """Stage names (module or package names) in the order of DEVELOPERS.md's file table."""
    names = [m.group(1) for line in text.splitlines() if (m := _ROW.match(line))]
    return list(dict.fromkeys(names))


def _ranks(order: list[str]) -> dict[str, int]:
    ranks = {name: k for k, name in enumerate(order)}
    for alias, stage in ALIASES.items():
        ranks.setdefault(alias, ranks[stage])
    ranks[FACADE] = len(order)
    return ranks


def _stage_of(parts: tuple[str, ...]) -> str:
    """Stage of a module inside ``probeplan`` from its dotted parts after ``probeplan``."""
    if not parts or parts[0] in ("__init__", "__main__"):
        return FACADE
    return parts[0]


def _imported(tree: ast.AST, package: tuple[str, ...], known: set[str]):
    """``(line, dotted parts after probeplan)`` of every probeplan module a file imports.

    ``package`` is the dotted parts of the file's own package (``()`` for the top level);
    ``known`` the top-level module and package names, to tell ``from . import report`` (a
    module) from ``from . import __version__`` (a name of the package root).
    """
    for node in ast.walk(tree):  # every import, at the top, in functions, under TYPE_CHECKING
        if isinstance(node, ast.Import):
            for alias in node.names:
                parts = alias.name.split(".")
                if parts[0] == "probeplan":
                    yield node.lineno, tuple(parts[1:])
            continue
        if not isinstance(node, ast.ImportFrom):
            continue
        module = node.module.split(".") if node.module else []
        if node.level:
            base = package[: len(package) - (node.level - 1)]
        elif module[:1] == ["probeplan"]:
            base, module = (), module[1:]
        else:
            continue
        if module:
            yield node.lineno, (*base, *module)
            continue
        for alias in node.names:  # ``from . import x``: x is a module or a name of the root
            yield node.lineno, (*base, alias.name) if base or alias.name in known else ()


def violations(sources: dict[tuple[str, ...], str], order: list[str]) -> list[str]:
    """Every import against the table's direction, and every module the table lacks.

    Parameters
    ----------
    sources : dict
        Dotted parts of each module after ``probeplan`` (``("site", "grid")``, ``("__init__",)``
        for the root) → its source text.
    order : list of str
        Stage names, top row first (:func:`table_order`).
    """
    ranks = _ranks(order)
    known = {parts[0] for parts in sources} | set(ranks)
    found = []
    for parts, text in sorted(sources.items()):
        stage = _stage_of(parts)
        name = "probeplan." + ".".join(parts)
        if stage not in ranks:
            found.append(f"{name}: no row in the DEVELOPERS.md file table; add one")
            continue
        for line, target in _imported(ast.parse(text), parts[:-1], known):
            to = _stage_of(target)
            if to != stage and ranks.get(to, len(ranks)) > ranks[stage]:
                found.append(
                    f"{name} line {line} imports probeplan.{'.'.join(target) or '__init__'} "
                    f"({to}), which is not above {stage} in the DEVELOPERS.md table"
                )
    return found


def package_sources() -> dict[tuple[str, ...], str]:
    out = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        rel = path.relative_to(PACKAGE).with_suffix("")
        out[rel.parts] = path.read_text(encoding="utf-8")
    return out


def test_every_import_follows_the_table():
    order = table_order((REPO / "DEVELOPERS.md").read_text(encoding="utf-8"))
    assert "errors" in order and "cli" in order  # the table was found and read
    assert violations(package_sources(), order) == []


def test_every_row_names_a_module():
    order = table_order((REPO / "DEVELOPERS.md").read_text(encoding="utf-8"))
    missing = [
        n for n in order if not (PACKAGE / f"{n}.py").is_file() and not (PACKAGE / n).is_dir()
    ]
    assert missing == []


ORDER = ["errors", "fisher", "problem", "search", "cli"]


@pytest.mark.parametrize(
    ("parts", "text", "expected"),
    [
        (("fisher",), "from .errors import InputError\n", []),
        (("search",), "def f():\n    from .problem import Problem\n", []),
        (
            ("fisher",),
            "def f():\n    from .search import plan\n",
            ["line 2 imports probeplan.search"],
        ),
        (("fisher",), "import probeplan.problem\n", ["line 1 imports probeplan.problem"]),
        (("fisher",), "from probeplan.cli import main\n", ["line 1 imports probeplan.cli"]),
        (("problem",), "from . import __version__\n", ["imports probeplan.__init__"]),
        (("cli",), "from . import fisher\n", []),
        (("search", "stages"), "from . import grid\nfrom ..problem import P\n", []),
        (("search", "stages"), "from ..cli import main\n", ["imports probeplan.cli (cli)"]),
        (("problem", "__init__"), "from .scoring import f\n", []),
        (("reruns",), "from .search import plan\n", []),
        (("unlisted",), "import numpy\n", ["no row in the DEVELOPERS.md file table"]),
    ],
)
def test_the_checker_sees_each_kind_of_import(parts, text, expected):
    """The checker itself, on made-up modules: each kind of import it must catch or allow."""
    found = violations({parts: text}, ORDER)
    assert len(found) == len(expected), found
    for message, part in zip(found, expected, strict=True):
        assert part in message


def test_table_order_reads_files_and_packages():
    text = "| `probeplan/errors.py` | x | y |\n| `probeplan/site/` | x | y |\n| other |\n"
    assert table_order(text) == ["errors", "site"]


def test_result_types_are_a_light_leaf():
    """The result types load without scipy, h5py, rich, numba, shapely or matplotlib."""
    heavy = ("scipy", "h5py", "rich", "numba", "shapely", "matplotlib")
    code = (
        "import sys, probeplan.resulttypes; "
        f"print(','.join(m for m in {heavy!r} if m in sys.modules))"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, cwd=REPO
    )
    assert out.stdout.strip() == ""


@pytest.mark.parametrize(
    ("module", "names"),
    [
        ("probeplan.problem", ("Score",)),
        ("probeplan.fisher", ("Direction",)),
        ("probeplan.result", ("Baseline", "SearchInfo", "BudgetTable", "Changes", "Score")),
        ("probeplan.store", ("param_unit", "value_unit", "probe_names")),
    ],
)
def test_result_types_keep_their_old_import_paths(module, names):
    """Code written before the leaf module existed still finds the same objects."""
    import importlib

    import probeplan.resulttypes as leaf

    old = importlib.import_module(module)
    assert [getattr(old, n) is getattr(leaf, n) for n in names] == [True] * len(names)
