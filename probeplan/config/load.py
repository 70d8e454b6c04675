"""The three ways in: a file, TOML text, or a mapping — all through the same checks.

:func:`load_config` reads a file, :func:`parse_config` parses TOML text and
:func:`config_from_mapping` takes the mapping ``tomllib`` would return (it keeps, as the
config's text, the TOML it writes for it). Each ends in :func:`_check`, which reads the top
level and hands every section to its parser module, in the order later checks depend on.
"""

from __future__ import annotations

import os
import tomllib
from collections.abc import Mapping
from pathlib import Path

from ..errors import InputError
from .background import parse_background
from .design import check_estimates, parse_design
from .frame import parse_frame
from .grades import check_installed_grades, parse_budget, parse_grades
from .ground import parse_ground
from .limits import check_sizes, check_text
from .maps import check_installed_names, parse_map_regions
from .model import Config
from .probes import parse_probes
from .reader import Checker, Table, syntax_message
from .regions import check_feasible, parse_regions
from .render import mapping_to_toml
from .sources import parse_sources
from .structures import check_regions_clear, parse_structures
from .vocab import CAUTIONS, STORM_HEIGHT_M

ROOT_KEYS = (
    "title",
    "seed",
    "caution",
    "ground",
    "frame",
    "probes",
    "region",
    "keepout",
    "source",
    "structure",
    "background",
    "design",
    "grade",
    "budget",
)
#: A byte-order mark some editors put at the start of a UTF-8 file; TOML does not allow it.
_BOM = "\ufeff"


def load_config(path: str | os.PathLike) -> Config:
    """Read and check a TOML config file.

    Parameters
    ----------
    path : str or path-like
        The file, UTF-8 (a leading byte-order mark is accepted). Relative paths inside it
        (``density_path``) are relative to its folder.

    Raises
    ------
    InputError
        The file is missing or unreadable, or any key is bad (one message, naming the key).
    """
    name = os.fspath(path)
    try:
        text = Path(name).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"{name}: no such config file.") from None
    except IsADirectoryError:
        raise InputError(f"{name}: is a folder, not a config file.") from None
    except UnicodeDecodeError as exc:
        raise InputError(
            f"{name}: not UTF-8 text (byte {exc.start}); a TOML config must be UTF-8."
        ) from None
    except OSError as exc:
        raise InputError(f"{name}: cannot read the config file: {exc.strerror}.") from None
    return parse_config(text, name)


def parse_config(text: str, path: str = "<config>") -> Config:
    """Check a TOML config given as text.

    Parameters
    ----------
    text : str
        The TOML document (a leading byte-order mark is dropped).
    path : str
        Where it came from: named in every message, and its folder is the base of relative
        ``density_path`` values (the working folder for ``"<config>"``).

    Raises
    ------
    InputError
        On the first problem found, naming the file, the key, what was found and what is
        allowed.
    """
    path = os.fspath(path)
    text = text.removeprefix(_BOM)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(syntax_message(path, text, exc)) from None
    return _check(data, text, path, Path(path).expanduser().parent)


def config_from_mapping(
    mapping: Mapping, path: str = "<mapping>", base_dir: str | os.PathLike | None = None
) -> Config:
    """Check a config given as a mapping, the one ``tomllib.load`` returns for a file.

    Parameters
    ----------
    mapping : Mapping
        Tables as mappings, arrays of tables as lists of mappings; values as TOML has them
        (str, int, float, bool, dates, lists; tuples count as arrays).
    path : str
        Named in every message.
    base_dir : str, path-like or None
        The base of relative ``density_path`` values; ``None``: the folder of ``path`` (the
        working folder for ``"<mapping>"``).

    Returns
    -------
    Config
        The same config :func:`parse_config` makes of the equivalent TOML; its ``text`` is
        that TOML, written from the mapping.

    Raises
    ------
    InputError
        As :func:`parse_config`, and for a value TOML cannot hold (``None``, an object),
        naming its key.
    """
    path = os.fspath(path)
    text = mapping_to_toml(mapping, path)
    # Read back from the text, so the config and its stored text cannot disagree.
    data = tomllib.loads(text)
    base = Path(path).expanduser().parent if base_dir is None else Path(base_dir).expanduser()
    return _check(data, text, path, base)


def _check(data: dict, text: str, path: str, base: Path) -> Config:
    """Every check, section by section; ``base`` is the folder of relative paths."""
    ck = Checker(path)
    check_text(ck, data)
    root = Table(ck, data, "", "the top level")
    root.check_keys(ROOT_KEYS)
    title = root.string("title", default="")
    seed = root.integer("seed", default=0, ge=0)
    ground_z_m = parse_ground(root)
    frame = parse_frame(root)
    probes, installed = parse_probes(root, ground_z_m, frame)
    mapped = parse_map_regions(root, frame, ground_z_m, base)
    installed = check_installed_names(ck, installed + mapped.installed)
    sources = parse_sources(root, ground_z_m, base, frame)
    structures = parse_structures(root, ground_z_m, base, sources, mapped.structures)
    regions = parse_regions(root, "region", ground_z_m, structures) + mapped.regions
    keepouts = parse_regions(root, "keepout", ground_z_m) + mapped.keepouts
    background = parse_background(root)
    design = parse_design(root)
    check_estimates(ck, sources, background, design)
    grades = parse_grades(root, probes)
    check_installed_grades(ck, installed, grades)
    budget = parse_budget(root, grades, design)

    heuristic = ground_z_m is not None and any(
        s.source.center_m[2] - ground_z_m >= STORM_HEIGHT_M for s in sources
    )
    caution = root.choice("caution", CAUTIONS, default="lightning" if heuristic else "general")

    config = Config(
        path=path,
        text=text,
        title=title,
        seed=seed,
        ground_z_m=ground_z_m,
        probes=probes,
        installed=installed,
        regions=regions,
        keepouts=keepouts,
        sources=sources,
        structures=structures,
        background=background,
        design=design,
        grades=grades,
        budget=budget,
        storm_watch=caution == "lightning",
        caution=caution,
        frame=frame,
    )
    check_sizes(ck, config)
    check_regions_clear(ck, config)
    check_feasible(ck, config)
    return config
