"""HDF5 result files in and out, and layout CSV files in and out.

Map of this package (every name below is importable from ``probeplan.store``):

1. :func:`write_result` / :func:`read_result`: one :class:`~probeplan.result.Result` per file,
   every path of the contract's "Result file (HDF5)" table plus what ``probeplan show`` needs to
   reprint the whole summary from the file alone. Every dataset with a unit carries an attr
   ``units``. A file is written whole or not at all (see :mod:`.files`): an existing file
   is kept unless ``force``, and only a regular file is ever replaced.
   Writing in :mod:`.write`, reading in :mod:`.read`.
2. :mod:`.files`: :func:`check_writable` (before a run spends its time), the atomic write of
   every file, and :func:`free_name` / :func:`free_names`, the default output names
   (``demo.h5``, ``demo-2.h5`` …).
3. :func:`read_layout_csv` / :func:`write_layout_csv` (:mod:`.layout_csv`): a layout of new
   probes, one probe a row; :func:`write_layout_geojson` (:mod:`.layout_map`): every meter and
   the site on a map (RFC 7946), for results with a frame.
4. Re-exported from :mod:`probeplan.resulttypes`: :func:`param_unit`, :func:`value_unit`,
   :func:`probe_names`.

File layout (beyond the contract's paths)::

    /                      attrs probeplan_version, created_utc, command, config_toml, seed,
                           complete, title, config_path, caution, sign_convention,
                           [ground_z_m] (absent: free space)
    /frame                 attrs datum, local, origin_lon_deg, origin_lat_deg, origin_height_m
                           (only with a [frame]: the WGS84 origin of the local metres)
    /layout/positions_m    (n_probes, 3)  m        all probes, installed first
    /layout/installed      (n_probes,)    bool
    /layout/names          (n_probes,)    str      installed names from the config, then new-k
    /layout/axes           (n_probes, n_axes, 3) 1 what each meter reads (zero rows: unused)
    /layout/grade          (n_probes,)    str      each meter's grade; "" = the [probes] noise
    /scenarios/params      (n_scenarios, n_params) attrs names, units (one per parameter)
    /score/fisher          (n_scenarios, n_params, n_params)
    /score/crb_std         (n_scenarios, n_params) attrs units (one per parameter)
    /score/value           ()             attrs criterion, aggregate, units
    /score/per_scenario    (n_scenarios,)
    /score/gain            (n_probes,)    1
    /score/saturated       (n_probes,)    1        fraction of scenarios saturating
    /score/singular        (n_scenarios,) bool
    /score/unresolved_text        (n_directions,) str   attr scenario
    /score/unresolved_weights     (n_directions, n_params)
    /score/unresolved_eigenvalue  (n_directions,)
    /score/unresolved_singular    (n_directions,) bool
    /score/failure_values  (n_probes,)    criterion with each single probe lost (if computed)
    /search/history, /search/bound, /search/bound_gap, /search/grid_spacing_m,
    /search/n_candidates, /search/seconds, /search/stage_names, /search/stage_values,
    /search/baseline_names, /search/baseline_values, /search/baselines/{k}/positions_m,
                           attr objective
    /search/restart_values (n_runs,)      criterion units, attr starts: the final value of
                           every complete exchange search when restarts ran (the greedy
                           start's first); absent when none ran (or in older files)
    /budget/count, grade, cost, value, meets_target, pareto  attrs cheapest, [target]
    /budget/layouts/{row}/positions_m
    /extra                 attrs name -> float
    /notes                 (n_notes,)     str      what the user must know (rule violations …)
    /changes, /simulation  one field a dataset (arrays, floats) or attr (str, int, bool);
                           attr none_fields lists the fields that were None
    /locate                the same for the fits of recorded readings (``locate``):
                           time_s (n_times,) s, estimate (n_times, n_params) attr names,
                           std, chi2, dof, converged, outliers (n_times, n_meters) bool, …;
    /locate/delivery       the delivery check against a truth, when one was given
"""

from __future__ import annotations

from ..resulttypes import param_unit, probe_names, value_unit
from .files import check_writable, free_name, free_names
from .layout_csv import LAYOUT_COLUMNS, LayoutFile, read_layout_csv, write_layout_csv
from .layout_map import write_layout_geojson
from .read import read_result
from .write import SIGN_CONVENTION, write_result

__all__ = [
    "LAYOUT_COLUMNS",
    "SIGN_CONVENTION",
    "LayoutFile",
    "check_writable",
    "free_name",
    "free_names",
    "param_unit",
    "probe_names",
    "read_layout_csv",
    "read_result",
    "value_unit",
    "write_layout_csv",
    "write_layout_geojson",
    "write_result",
]
