"""[[source]] (probeplan.config.sources): kinds, estimates, ranges, density files, ground.

The charges and files are invented for the tests.
"""

from __future__ import annotations

import numpy as np
import pytest
from config_cases import (
    EST,
    SOURCE_POINT,
    assert_bad_case,
    assert_pieces,
    edited,
    message,
    write,
)

from probeplan.config import load_config, parse_config


def test_ranges_for_known_parameters_and_background_estimate_default():
    text = edited('estimate = ["charge", "x", "y", "z"]', 'estimate = ["x", "y"]')
    text += "charge_range_c = [-30.0, -30.0]\n\n[background]\nfield_v_per_m = [0, 0, -100]\n"
    cfg = parse_config(text)
    assert cfg.sources[0].estimate == ("x_m", "y_m")
    assert cfg.sources[0].ranges == (("charge_c", -30.0, -30.0),)
    assert cfg.background.estimate is True and cfg.background.ranges == ()
    assert cfg.background.field_v_per_m == (0.0, 0.0, -100.0)


def test_only_background_estimated_is_enough():
    text = edited('estimate = ["charge", "x", "y", "z"]', "estimate = []")
    cfg = parse_config(text + "\n[background]\nfield_v_per_m = [0, 0, -100]\n")
    assert cfg.sources[0].estimate == ()


def test_density_path_is_relative_to_the_config_folder(tmp_path, monkeypatch):
    (tmp_path / "site").mkdir()
    np.save(tmp_path / "site" / "cloud.npy", np.full((2, 2, 2), 1e-9))
    text = edited(
        'kind = "point"\ncharge_c = -20.0\ncenter_m = [0.0, 0.0, 7000.0]',
        'kind = "grid"\ndensity_path = "cloud.npy"\norigin_m = [0, 0, 4000]\nspacing_m = 200.0',
    )
    monkeypatch.chdir(tmp_path)  # not the config's folder
    cfg = load_config(write(tmp_path / "site", text))
    grid = cfg.sources[0].source
    assert grid.spacing_m == (200.0, 200.0, 200.0)
    # charge = density × cell volume × cells = 1e-9 × 200³ × 8
    assert grid.charge_c == pytest.approx(1e-9 * 200.0**3 * 8)


BAD = {
    "unknown estimate name": (
        (EST, 'estimate = ["charge", "q"]'),
        [
            '`source[0].estimate[1]`: unknown parameter name "q"',
            "allowed for a point source: charge, x, y, z",
        ],
    ),
    "estimate invalid for the kind": (
        (EST, 'estimate = ["radius"]'),
        ["`radius` is not a parameter of a point source; allowed: charge, x, y, z"],
    ),
    "duplicated estimate": (
        (EST, 'estimate = ["x", "y", "x"]'),
        ["`source[0].estimate[2]`: `x` is listed twice"],
    ),
    "estimate not an array": (
        (EST, 'estimate = "x"'),
        ["`source[0].estimate` must be an array of parameter names", 'got "x" (a string)'],
    ),
    "nothing estimated": (
        (EST, "estimate = []"),
        ["nothing to estimate", "estimate = "],
    ),
    "source below ground": (
        ("[0.0, 0.0, 7000.0]", "[0.0, 0.0, -5.0]"),
        [
            "`source[0].center_m` puts the point source down to z = -5 m, not above the ground "
            "plane at z = 0 m"
        ],
    ),
    "centre range below ground": (
        (EST, EST + "\ncenter_range_m = [[0, 0], [0, 0], [-100.0, 9000.0]]"),
        ["`source[0].center_range_m` let the point source reach down to z = -100 m"],
    ),
    "sphere radius range below ground": (
        (
            SOURCE_POINT,
            'kind = "sphere"\ncharge_c = 1.0\ncenter_m = [0, 0, 1000.0]\nradius_m = 500.0\n'
            "radius_range_m = [100.0, 1200.0]",
        ),
        [
            "`source[0].radius_range_m` let the sphere source reach down to z = -200 m",
            "minus 1200 m from the centre",
        ],
    ),
    "sphere centre range minus radius below ground": (
        (
            SOURCE_POINT,
            'kind = "sphere"\ncharge_c = 1.0\ncenter_m = [0, 0, 1000.0]\nradius_m = 500.0\n'
            "center_range_m = [[0, 0], [0, 0], [400.0, 1000.0]]",
        ),
        ["`source[0].center_range_m` let the sphere source reach down to z = -100 m"],
    ),
    "line end below ground": (
        (SOURCE_POINT, 'kind = "line"\ncharge_c = 1.0\nstart_m = [0, 0, 10]\nend_m = [0, 0, -1]'),
        ["`source[0].start_m` / `end_m` puts the line source down to z = -1 m"],
    ),
    "line range below ground": (
        (
            SOURCE_POINT,
            'kind = "line"\ncharge_c = 1.0\nstart_m = [0, 0, 100]\nend_m = [0, 0, 300]\n'
            "center_range_m = [[0, 0], [0, 0], [50.0, 300.0]]",
        ),
        ["`source[0].center_range_m` let the line source reach down to z = -50 m"],
    ),
    "sphere radius negative": (
        (
            SOURCE_POINT,
            'kind = "sphere"\ncharge_c = 1.0\ncenter_m = [0, 0, 1000.0]\nradius_m = -2.0',
        ),
        ["cfg.toml: source[0]: `radius_m` must be > 0; got -2.0."],
    ),
    "line of zero length": (
        (SOURCE_POINT, 'kind = "line"\ncharge_c = 1.0\nstart_m = [0, 0, 10]\nend_m = [0, 0, 10]'),
        ["cfg.toml: source[0]: `start_m` and `end_m` of a line charge must differ"],
    ),
    "sigma range not positive": (
        (
            SOURCE_POINT,
            'kind = "gaussian"\ncharge_c = 1.0\ncenter_m = [0, 0, 1000.0]\nsigma_m = 10.0\n'
            "sigma_range_m = [0.0, 20.0]",
        ),
        ["`source[0].sigma_range_m[0]` must be > 0; got 0.0"],
    ),
    "no source": (
        ("[[source]]\n" + SOURCE_POINT + "\n" + EST, ""),
        ["no [[source]] table is given; at least one is needed"],
    ),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_input_gives_one_clear_message(tmp_path, case):
    assert_bad_case(tmp_path, *BAD[case])


def _grid_text(path: str) -> str:
    return edited(
        SOURCE_POINT,
        f'kind = "grid"\ndensity_path = "{path}"\norigin_m = [0, 0, 4000]\nspacing_m = 100.0',
    )


def test_grid_density_file_missing(tmp_path):
    msg = message(tmp_path, _grid_text("absent.npy"))
    assert_pieces(
        msg, '`source[0].density_path` = "absent.npy": no such file', "config file's folder"
    )


@pytest.mark.parametrize(
    "array, piece",
    [
        (np.ones((2, 2)), "the array must be 3-D (nx, ny, nz) of C/m³; got shape (2, 2)"),
        (np.full((2, 2, 2), np.nan), "the density must be finite"),
        (np.array(["a"] * 8).reshape(2, 2, 2), "the array must hold real numbers"),
    ],
)
def test_grid_density_file_bad(tmp_path, array, piece):
    np.save(tmp_path / "rho.npy", array)
    assert_pieces(message(tmp_path, _grid_text("rho.npy")), "`source[0].density_path`", piece)


def test_grid_density_file_not_npy(tmp_path):
    (tmp_path / "rho.npy").write_text("not an array")
    msg = message(tmp_path, _grid_text("rho.npy"))
    assert_pieces(msg, '`source[0].density_path` = "rho.npy": not a readable .npy array file')


def test_neutral_grid_cannot_have_its_charge_estimated(tmp_path):
    rho = np.zeros((2, 2, 2))
    rho[0, 0, 1], rho[1, 1, 1] = 1e-9, -1e-9
    np.save(tmp_path / "rho.npy", rho)
    msg = message(tmp_path, _grid_text("rho.npy"))
    assert_pieces(msg, "`source[0].estimate`: the grid's net charge is zero")


def test_grid_keys_of_other_kinds_rejected(tmp_path):
    np.save(tmp_path / "rho.npy", np.ones((1, 1, 1)))
    text = _grid_text("rho.npy").replace("spacing_m = 100.0", "spacing_m = 100.0\ncharge_c = 1.0")
    assert_pieces(message(tmp_path, text), "`charge_c` does not apply to a grid source (source[0])")
