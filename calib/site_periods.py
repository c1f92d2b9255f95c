"""Stage 2 for unpaired side-by-side designs: hauls placed in site x period cells.

In a side-by-side study the gears fished the same sites in the same period, but not as strict
pairs: ``pair_id`` is ignored, and a *site-period* is every haul with the same ``site`` and the
same period. The period is the hauls table's ``period`` column when it has one, otherwise the
calendar month of the date (``--period-by``, :data:`PERIOD_BY`):

    month   year and month of the date, e.g. 2024-05
    season  meteorological season of the year: winter (December to February; December counts
            toward the next year's winter), spring (March to May), summer (June to August),
            autumn (September to November), e.g. 2024-spring
    year    the year of the date, e.g. 2024
    column  the text of the ``period`` column (it must be filled for every haul)
    auto    ``column`` when the hauls table has a ``period`` column, else ``month`` (default)

Only site-periods fished by at least two gears inform theta (the gears' catchability ratio);
hauls in a site-period with a single gear are kept in the model (they inform the spread of
density between site-periods and the patchiness of their gear) and are counted in ``report``.

Public: :data:`PERIOD_BY`, :func:`period_labels`, :func:`site_period_gear_graph`,
:class:`SitePeriodData`, :func:`build_site_periods`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from itertools import combinations

import numpy as np
import pandas as pd

from calib.cells import Cells, cells_from_arrays, connected_to

PERIOD_BY = ("auto", "column", "month", "season", "year")
PERIOD_COLUMN = "period"
_SEASON = {12: "winter", 1: "winter", 2: "winter", 3: "spring", 4: "spring", 5: "spring",
           6: "summer", 7: "summer", 8: "summer", 9: "autumn", 10: "autumn", 11: "autumn"}


def resolve_period_by(hauls: pd.DataFrame, period_by: str = "auto") -> str:
    """The period rule actually used: ``auto`` becomes ``column`` or ``month``."""
    if period_by not in PERIOD_BY:
        raise ValueError(f"period_by must be one of {PERIOD_BY}, not {period_by!r}")
    if period_by == "auto":
        return "column" if PERIOD_COLUMN in hauls.columns else "month"
    return period_by


def _text(value) -> str | None:
    """A period cell as text; None when blank (numbers like 3.0 become '3')."""
    if value is None or (isinstance(value, float) and np.isnan(value)) or value is pd.NA:
        return None
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    text = str(value).strip()
    return text or None


def period_labels(hauls: pd.DataFrame, period_by: str = "auto") -> pd.Series:
    """Period of every haul as text (None where the ``period`` column is blank).

    ``hauls`` is a validated hauls table (``date`` as datetime64). See the module docstring
    for the rules. Raises ValueError for ``column`` when the table has no ``period`` column
    (validation, :func:`calib.tables.side_by_side_problems`, reports that to the user first).
    """
    rule = resolve_period_by(hauls, period_by)
    date = pd.to_datetime(hauls["date"])
    if rule == "column":
        if PERIOD_COLUMN not in hauls.columns:
            raise ValueError("the hauls table has no 'period' column")
        return pd.Series([_text(v) for v in hauls[PERIOD_COLUMN]], index=hauls.index, dtype=object)
    if rule == "month":
        return pd.Series(date.dt.strftime("%Y-%m").to_numpy(), index=hauls.index, dtype=object)
    if rule == "year":
        return pd.Series(date.dt.year.astype(str).to_numpy(), index=hauls.index, dtype=object)
    month = date.dt.month
    year = date.dt.year + (month == 12).astype(int)
    return pd.Series([f"{y}-{_SEASON[m]}" for y, m in zip(year, month)], index=hauls.index, dtype=object)


def site_period_keys(hauls: pd.DataFrame, period_by: str = "auto") -> pd.Series:
    """'site | period' label of every haul (None where site or period is blank)."""
    period = period_labels(hauls, period_by)
    site = hauls["site"] if "site" in hauls.columns else pd.Series(None, index=hauls.index, dtype=object)
    out = []
    for s, p in zip(site, period):
        s = _text(s)
        out.append(None if s is None or p is None else f"{s} | {p}")
    return pd.Series(out, index=hauls.index, dtype=object)


def site_period_gear_graph(hauls: pd.DataFrame, keys: pd.Series) -> dict[str, set[str]]:
    """Adjacency of gears that fished the same site-period (keys from :func:`site_period_keys`)."""
    graph: dict[str, set[str]] = {g: set() for g in hauls["gear"].unique()}
    frame = pd.DataFrame({"key": keys.to_numpy(), "gear": hauls["gear"].to_numpy()}).dropna()
    for _, gears in frame.groupby("key")["gear"]:
        gs = set(gears)
        for g in gs:
            graph[g].update(gs - {g})
    return graph


@dataclass
class SitePeriodData:
    """Arrays the side-by-side model reads. Gear 0 is the reference gear.

    One *observation* is a haul x species (only pairs the haul's source recorded).

    obs_count:     (n_obs,) int64, fish of the species in the haul
    obs_haul:      (n_obs,) int index into ``haul_ids``
    obs_species:   (n_obs,) int index into ``species``
    haul_gear:     (n_hauls,) int index into ``gears``
    haul_cell:     (n_hauls,) int index into ``site_periods``
    haul_effort:   (n_hauls,) float, effort in the gear's own effort unit
    species_pool:  (n_species,) int index into ``pool_groups``
    cells:         :class:`calib.cells.Cells` of the site-periods fished by two or more gears
                   (counts and effort summed per gear; ``groups`` are the site-period labels):
                   n_groups / n_caught per factor and the pilot information for the
                   parametrization come from it.
    shared:        DataFrame gear_a, gear_b, n_site_periods: site-periods where both fished.
    report:        counts for the manifest (hauls, site-periods, hauls in single-gear ones, ...).
    """

    reference: str
    gears: list[str]
    species: list[str]
    haul_ids: list[str]
    site_periods: list[str]
    pool_groups: list[str]
    obs_count: np.ndarray
    obs_haul: np.ndarray
    obs_species: np.ndarray
    haul_gear: np.ndarray
    haul_cell: np.ndarray
    haul_effort: np.ndarray
    species_pool: np.ndarray
    effort_unit: dict[str, str]
    cells: Cells
    shared: pd.DataFrame
    period_by: str = "month"
    report: dict = field(default_factory=dict)

    @property
    def n_gears(self) -> int:
        return len(self.gears)

    @property
    def n_species(self) -> int:
        return len(self.species)

    @property
    def n_hauls(self) -> int:
        return len(self.haul_ids)

    @property
    def n_obs(self) -> int:
        return int(self.obs_count.shape[0])

    @property
    def n_site_periods(self) -> int:
        return len(self.site_periods)

    def multi_gear_cells(self) -> np.ndarray:
        """(n_site_periods,) bool: the site-period was fished by two or more gears."""
        present = np.zeros((self.n_site_periods, self.n_gears), dtype=bool)
        present[self.haul_cell, self.haul_gear] = True
        return present.sum(axis=1) >= 2


def from_arrays(
    count: np.ndarray,
    haul_gear: np.ndarray,
    haul_cell: np.ndarray,
    haul_effort: np.ndarray,
    gears: list[str],
    species: list[str],
    site_periods: list[str] | None = None,
    haul_ids: list[str] | None = None,
    species_pool: np.ndarray | None = None,
    pool_groups: list[str] | None = None,
    effort_unit: dict[str, str] | None = None,
    period_by: str = "month",
    observed: np.ndarray | None = None,
) -> SitePeriodData:
    """Assemble :class:`SitePeriodData` from a (n_hauls, n_species) count matrix.

    ``observed`` (n_hauls, n_species) bool marks the haul x species that were recorded
    (default all). Used by :func:`build_site_periods`, the simulators and tests.
    """
    count = np.asarray(count)
    haul_gear = np.asarray(haul_gear, dtype=np.int64)
    haul_cell = np.asarray(haul_cell, dtype=np.int64)
    haul_effort = np.asarray(haul_effort, dtype=float)
    n_hauls, n_species = count.shape
    n_gears = len(gears)
    n_cells = int(haul_cell.max()) + 1 if n_hauls else 0
    site_periods = list(site_periods) if site_periods is not None else [f"sp{i}" for i in range(n_cells)]
    n_cells = max(n_cells, len(site_periods))
    haul_ids = list(haul_ids) if haul_ids is not None else [f"h{i}" for i in range(n_hauls)]
    if observed is None:
        observed = np.ones(count.shape, dtype=bool)
    obs_haul, obs_species = np.nonzero(observed)
    obs_count = np.rint(count[obs_haul, obs_species]).astype(np.int64)
    if species_pool is None:
        species_pool, pool_groups = np.zeros(n_species, dtype=int), ["all"]

    # Site-period x gear sums (observed entries only) for the Cells summary.
    present = np.zeros((n_cells, n_gears), dtype=bool)
    present[haul_cell, haul_gear] = True
    effort = np.zeros((n_cells, n_gears))
    np.add.at(effort, (haul_cell, haul_gear), haul_effort)
    summed = np.zeros((n_cells, n_species, n_gears))
    np.add.at(summed, (haul_cell[obs_haul], obs_species, haul_gear[obs_haul]), obs_count)
    multi = present.sum(axis=1) >= 2
    cell_idx = np.nonzero(multi)[0]
    c_group = np.repeat(np.arange(len(cell_idx)), n_species)
    c_species = np.tile(np.arange(n_species), len(cell_idx))
    cells = cells_from_arrays(
        summed[cell_idx].reshape(-1, n_gears), np.repeat(present[cell_idx], n_species, axis=0),
        np.repeat(effort[cell_idx], n_species, axis=0), c_group, c_species, list(gears), list(species),
        species_pool=species_pool, pool_groups=pool_groups,
    )
    cells.groups = [site_periods[i] for i in cell_idx]
    cells.group_present = present[cell_idx]
    cells.group_effort = effort[cell_idx]
    cells.effort_unit = dict(effort_unit or {g: "" for g in gears})

    rows = []
    for a, b in combinations(range(n_gears), 2):
        rows.append((gears[a], gears[b], int((present[:, a] & present[:, b]).sum())))
    shared = pd.DataFrame(rows, columns=["gear_a", "gear_b", "n_site_periods"])
    single = ~multi[haul_cell]
    report = {
        "design": "side-by-side",
        "period_by": period_by,
        "n_hauls": int(n_hauls),
        "n_site_periods": int(n_cells),
        "n_site_periods_two_or_more_gears": int(multi.sum()),
        "hauls_in_single_gear_site_periods": int(single.sum()),
        "hauls_in_single_gear_site_periods_note": (
            "kept in the model: they inform the spread of density between site-periods and the "
            "gear's patchiness, but carry no information about the gears' catchability ratio"
        ),
        "n_observations": int(len(obs_count)),
        "site_periods_per_gear_pair": shared.to_dict("records"),
        # keys FactorSet.summary() reads, in this design's terms
        "n_groups": int(multi.sum()),
        "n_cells": int(cells.n_cells),
        "zero_total_cells_dropped": int(cells.report.get("zero_total_cells_dropped", 0)),
    }
    cells.report = dict(report)
    return SitePeriodData(
        reference=gears[0], gears=list(gears), species=list(species), haul_ids=haul_ids,
        site_periods=site_periods, pool_groups=list(pool_groups), obs_count=obs_count,
        obs_haul=obs_haul.astype(np.int64), obs_species=obs_species.astype(np.int64),
        haul_gear=haul_gear, haul_cell=haul_cell, haul_effort=haul_effort,
        species_pool=np.asarray(species_pool, dtype=np.int64),
        effort_unit=dict(effort_unit or {g: "" for g in gears}), cells=cells, shared=shared,
        period_by=period_by, report=report,
    )


def build_site_periods(
    hauls: pd.DataFrame,
    counts: pd.DataFrame,
    reference: str,
    period_by: str = "auto",
    species_groups: dict[str, str] | None = None,
    species: list[str] | None = None,
) -> SitePeriodData:
    """Place every haul in its site-period and collect the model's arrays.

    Parameters
    ----------
    hauls : validated hauls table (``Tables.hauls``) that passed
        :func:`calib.tables.side_by_side_problems` (every haul has a site and a period, every
        gear is linked to the reference through shared site-periods).
    counts : zero-completed haul x species table (``tables.complete_zeros``): haul_id, species,
        count (whole numbers). Haul x species pairs missing from it (species not recorded by the
        haul's source) are not observations.
    reference : the reference gear (gear 0).
    period_by : see :data:`PERIOD_BY`.
    species_groups : optional species -> pooling group; default one group "all".
    species : optional species order; default sorted names.
    """
    rule = resolve_period_by(hauls, period_by)
    keys = site_period_keys(hauls, rule)
    reachable = connected_to(reference, site_period_gear_graph(hauls, keys))
    use = keys.notna().to_numpy() & hauls["gear"].isin(reachable).to_numpy()
    h = hauls[use].reset_index(drop=True)
    k = keys[use].reset_index(drop=True)
    gears = [reference] + sorted(set(h["gear"]) - {reference})
    gear_index = {g: i for i, g in enumerate(gears)}
    site_periods = sorted(k.unique())
    cell_index = {c: i for i, c in enumerate(site_periods)}
    if species is None:
        species = sorted(counts["species"].unique())
    species_index = {s: i for i, s in enumerate(species)}
    haul_index = {hid: i for i, hid in enumerate(h["haul_id"])}

    c = counts[counts["haul_id"].isin(haul_index) & counts["species"].isin(species_index)]
    hi = c["haul_id"].map(haul_index).to_numpy()
    si = c["species"].map(species_index).to_numpy()
    count = np.zeros((len(h), len(species)))
    observed = np.zeros((len(h), len(species)), dtype=bool)
    count[hi, si] = c["count"].to_numpy(dtype=float)
    observed[hi, si] = True

    if species_groups is None:
        pool_groups, species_pool = ["all"], np.zeros(len(species), dtype=int)
    else:
        pool_groups = sorted({species_groups.get(s, "other") for s in species})
        species_pool = np.array([pool_groups.index(species_groups.get(s, "other")) for s in species])
    unit = h.drop_duplicates("gear").set_index("gear")["effort_unit"].to_dict()
    data = from_arrays(
        count, h["gear"].map(gear_index).to_numpy(), k.map(cell_index).to_numpy(),
        h["effort"].to_numpy(dtype=float), gears, list(species), site_periods=site_periods,
        haul_ids=list(h["haul_id"]), species_pool=species_pool, pool_groups=pool_groups,
        effort_unit={g: unit.get(g, "") for g in gears}, period_by=rule, observed=observed,
    )
    data.report["hauls_left_out"] = int((~use).sum())
    return data


def describe(tables, reference: str | None = None, period_by: str = "auto") -> str:
    """Plain-text summary of a side-by-side layout for ``calib check --design side-by-side``.

    Site-periods, how many each pair of gears shared, hauls in single-gear site-periods, and
    every rule the side-by-side fit would stop on (:func:`calib.tables.side_by_side_problems`).
    """
    from calib.tables import side_by_side_problems

    hauls = tables.hauls
    rule = resolve_period_by(hauls, period_by)
    lines = [f"Side-by-side layout (pair_id ignored; hauls compared by site and {rule}):",
             "  (the calibration-group counts and warnings above concern paired fits by pair_id; they do "
             "not apply to fit --design side-by-side)"]
    problems = side_by_side_problems(tables, reference, period_by)
    if "site" in hauls.columns and (rule != "column" or PERIOD_COLUMN in hauls.columns):
        keys = site_period_keys(hauls, rule)
        frame = pd.DataFrame({"key": keys, "gear": hauls["gear"]}).dropna()
        gears_at = frame.groupby("key")["gear"].agg(lambda s: frozenset(s))
        multi = gears_at[gears_at.map(len) >= 2]
        single_hauls = int(frame["key"].isin(gears_at[gears_at.map(len) < 2].index).sum())
        lines.append(f"  {len(frame)} hauls with a site and period in {len(gears_at)} site-periods; "
                     f"{len(multi)} fished by two or more gears; {single_hauls} hauls in single-gear "
                     "site-periods (kept by the fit, but no information on the factors)")
        gears = sorted(hauls["gear"].unique())
        lines.append("  site-periods shared per gear pair:")
        for a, b in combinations(gears, 2):
            n = int(sum(1 for gs in multi if a in gs and b in gs))
            lines.append(f"    {a} + {b}: {n}")
    if problems:
        lines.append("  fit --design side-by-side stops on:")
        lines.extend(f"    - {p}" for p in problems)
    else:
        lines.append("  no problem for fit --design side-by-side" + ("" if reference else
                     " (give --reference to check that every gear is linked to it)"))
    lines.append("  Factors from side-by-side hauls hold only if the gears sampled the same animals "
                 "(same habitat); see docs/methods.md, section 8b.")
    return "\n".join(lines)
