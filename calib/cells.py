"""Stage 2: calibration cells from calibration groups.

A calibration group is every haul sharing a ``pair_id``. Within a group, hauls of
the same gear are summed (counts and effort). A *cell* is one group x species
(x length class, later) with a non-zero total: it holds the counts of every gear
present in the group and the relative-effort weights

    w_ig = effort_ig / mean_g'(effort_ig')       (mean over the gears present in group i)

Cells with a zero total carry no information about the split and are dropped
(counted in ``report``). Gears absent from a group are masked (``present`` False).
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, field

import numpy as np
import pandas as pd


@dataclass
class Cells:
    """Arrays the calibration models read. Gear 0 is always the reference gear.

    Shapes: ``n_cells`` rows, ``n_gears`` columns.

    counts:       (n_cells, n_gears) int64, count of the species by each gear (0 where absent)
    present:      (n_cells, n_gears) bool, the gear fished in the cell's group
    weight:       (n_cells, n_gears) float, relative effort w_ig (dimensionless; 0 where absent)
    effort:       (n_cells, n_gears) float, summed effort in the gear's own effort unit (0 where absent)
    cell_group:   (n_cells,) int index into ``groups``
    cell_species: (n_cells,) int index into ``species``
    group_present, group_effort: (n_groups, n_gears) for every kept group, including
                  groups where no species was caught (None when built from cell arrays)
    cell_combo:   (n_cells,) int index into ``combos`` (the set of gears in the group)
    species_pool: (n_species,) int index into ``pool_groups``
    """

    reference: str
    gears: list[str]
    species: list[str]
    groups: list[str]
    combos: list[str]
    pool_groups: list[str]
    counts: np.ndarray
    present: np.ndarray
    weight: np.ndarray
    effort: np.ndarray
    cell_group: np.ndarray
    cell_species: np.ndarray
    cell_combo: np.ndarray
    species_pool: np.ndarray
    effort_unit: dict[str, str]
    report: dict = field(default_factory=dict)
    # Per calibration group (also groups where nothing was caught): which gears fished, effort.
    group_present: np.ndarray | None = None
    group_effort: np.ndarray | None = None

    @property
    def n_cells(self) -> int:
        return int(self.counts.shape[0])

    @property
    def n_gears(self) -> int:
        return len(self.gears)

    @property
    def n_species(self) -> int:
        return len(self.species)

    def totals(self) -> np.ndarray:
        """Group total n_is of each cell (fish)."""
        return self.counts.sum(axis=1)

    def to_frame(self) -> pd.DataFrame:
        """Long table: one row per cell x present gear (for inspection and baselines)."""
        c, g = np.nonzero(self.present)
        return pd.DataFrame(
            {
                "pair_id": np.asarray(self.groups, dtype=object)[self.cell_group[c]],
                "species": np.asarray(self.species, dtype=object)[self.cell_species[c]],
                "gear": np.asarray(self.gears, dtype=object)[g],
                "count": self.counts[c, g],
                "effort": self.effort[c, g],
                "weight": self.weight[c, g],
                "cell": c,
            }
        )


def calibration_hauls(hauls: pd.DataFrame) -> pd.DataFrame:
    """Hauls that belong to a calibration group (non-blank pair_id)."""
    pid = hauls["pair_id"]
    return hauls[pid.notna() & (pid.astype("string").str.strip() != "")]


def gear_graph(hauls: pd.DataFrame) -> dict[str, set[str]]:
    """Adjacency of gears that fished together in at least one calibration group."""
    cal = calibration_hauls(hauls)
    graph: dict[str, set[str]] = {g: set() for g in hauls["gear"].unique()}
    for _, gears in cal.groupby("pair_id")["gear"]:
        gs = set(gears)
        for g in gs:
            graph.setdefault(g, set()).update(gs - {g})
    return graph


def connected_to(reference: str, graph: dict[str, set[str]]) -> set[str]:
    """Gears reachable from ``reference`` through shared calibration groups (incl. itself)."""
    if reference not in graph:
        return set()
    seen = {reference}
    queue = deque([reference])
    while queue:
        g = queue.popleft()
        for h in graph[g]:
            if h not in seen:
                seen.add(h)
                queue.append(h)
    return seen


def build_cells(
    hauls: pd.DataFrame,
    counts: pd.DataFrame,
    reference: str,
    species_groups: dict[str, str] | None = None,
    species: list[str] | None = None,
) -> Cells:
    """Build calibration cells.

    Parameters
    ----------
    hauls : validated hauls table (``Tables.hauls``).
    counts : zero-completed haul x species table with columns haul_id, species, count
        (``tables.complete_zeros``). Counts must be whole numbers for fitting.
    reference : the reference gear; it becomes gear 0. Gears not connected to it
        through any group are left out (listed in ``report['unconnected_gears']``).
    species_groups : optional species -> pooling group; default one group "all".
    species : optional species order/subset; default sorted species names.
    """
    cal = calibration_hauls(hauls)
    graph = gear_graph(hauls)
    reachable = connected_to(reference, graph)
    unconnected = sorted(set(cal["gear"].unique()) - reachable)
    cal = cal[cal["gear"].isin(reachable)]

    # Sum several hauls of one gear in one group (counts and effort).
    per_group_gear = cal.groupby(["pair_id", "gear"], sort=True).agg(
        effort=("effort", "sum"), n_hauls=("haul_id", "size")
    )
    merged_groups = int(
        per_group_gear[per_group_gear["n_hauls"] > 1].index.get_level_values("pair_id").nunique()
    )
    n_gears_in_group = per_group_gear.groupby(level="pair_id").size()
    single_gear_groups = n_gears_in_group[n_gears_in_group < 2].index
    per_group_gear = per_group_gear.drop(index=single_gear_groups, level="pair_id")

    gears = [reference] + sorted(set(per_group_gear.index.get_level_values("gear")) - {reference})
    gear_index = {g: i for i, g in enumerate(gears)}
    groups = sorted(per_group_gear.index.get_level_values("pair_id").unique())
    group_index = {p: i for i, p in enumerate(groups)}
    n_groups, n_gears = len(groups), len(gears)

    effort_gg = np.zeros((n_groups, n_gears))
    present_gg = np.zeros((n_groups, n_gears), dtype=bool)
    for (pid, gear), row in per_group_gear.iterrows():
        i, g = group_index[pid], gear_index[gear]
        effort_gg[i, g] = row["effort"]
        present_gg[i, g] = True
    mean_effort = effort_gg.sum(axis=1) / present_gg.sum(axis=1)
    weight_gg = np.where(present_gg, effort_gg / mean_effort[:, None], 0.0)

    combo_label = ["+".join(g for g, p in zip(gears, row) if p) for row in present_gg]
    combos = sorted(set(combo_label))
    combo_of_group = np.array([combos.index(c) for c in combo_label], dtype=int)

    if species is None:
        species = sorted(counts["species"].unique())
    species_index = {s: i for i, s in enumerate(species)}

    c = counts.merge(cal[["haul_id", "pair_id", "gear"]], on="haul_id", how="inner")
    c = c[c["pair_id"].isin(group_index) & c["species"].isin(species_index)]
    summed = c.groupby(["pair_id", "species", "gear"], sort=False)["count"].sum().reset_index()

    n_species = len(species)
    full = np.zeros((n_groups, n_species, n_gears))
    full[
        summed["pair_id"].map(group_index).to_numpy(),
        summed["species"].map(species_index).to_numpy(),
        summed["gear"].map(gear_index).to_numpy(),
    ] = summed["count"].to_numpy()
    totals = full.sum(axis=2)
    gi, si = np.nonzero(totals > 0)
    n_zero = int((totals == 0).sum())

    if species_groups is None:
        pool_groups = ["all"]
        species_pool = np.zeros(n_species, dtype=int)
    else:
        pool_groups = sorted({species_groups.get(s, "other") for s in species})
        species_pool = np.array([pool_groups.index(species_groups.get(s, "other")) for s in species])

    unit = cal.drop_duplicates("gear").set_index("gear")["effort_unit"].to_dict()
    report = {
        "n_calibration_hauls": int(len(cal)),
        "n_groups": n_groups,
        "groups_with_summed_hauls": merged_groups,
        "single_gear_groups_dropped": int(len(single_gear_groups)),
        "zero_total_cells_dropped": n_zero,
        "n_cells": int(len(gi)),
        "unconnected_gears": unconnected,
    }
    return Cells(
        reference=reference,
        gears=gears,
        species=list(species),
        groups=groups,
        combos=combos,
        pool_groups=pool_groups,
        counts=np.rint(full[gi, si]).astype(np.int64),
        present=present_gg[gi],
        weight=weight_gg[gi],
        effort=effort_gg[gi],
        cell_group=gi.astype(int),
        cell_species=si.astype(int),
        cell_combo=combo_of_group[gi],
        species_pool=species_pool,
        effort_unit={g: unit.get(g, "") for g in gears},
        report=report,
        group_present=present_gg,
        group_effort=effort_gg,
    )


def cells_from_arrays(
    counts: np.ndarray,
    present: np.ndarray,
    effort: np.ndarray,
    cell_group: np.ndarray,
    cell_species: np.ndarray,
    gears: list[str],
    species: list[str],
    species_pool: np.ndarray | None = None,
    pool_groups: list[str] | None = None,
) -> Cells:
    """Assemble Cells directly from arrays (for simulations and tests).

    ``effort`` is per cell x gear; weights are computed as in :func:`build_cells`.
    Cells with a zero total are dropped.
    """
    counts = np.asarray(counts, dtype=np.int64)
    present = np.asarray(present, dtype=bool)
    effort = np.where(present, np.asarray(effort, dtype=float), 0.0)
    keep = counts.sum(axis=1) > 0
    mean_effort = effort.sum(axis=1) / np.maximum(present.sum(axis=1), 1)
    weight = np.where(present, effort / mean_effort[:, None], 0.0)
    labels = ["+".join(g for g, p in zip(gears, row) if p) for row in present]
    combos = sorted(set(labels))
    combo = np.array([combos.index(x) for x in labels], dtype=int)
    cell_group = np.asarray(cell_group, dtype=int)
    n_groups = int(cell_group.max()) + 1 if len(cell_group) else 0
    if species_pool is None:
        species_pool = np.zeros(len(species), dtype=int)
        pool_groups = ["all"]
    return Cells(
        reference=gears[0],
        gears=list(gears),
        species=list(species),
        groups=[f"g{i}" for i in range(n_groups)],
        combos=combos,
        pool_groups=list(pool_groups),
        counts=counts[keep],
        present=present[keep],
        weight=weight[keep],
        effort=effort[keep],
        cell_group=cell_group[keep],
        cell_species=np.asarray(cell_species, dtype=int)[keep],
        cell_combo=combo[keep],
        species_pool=np.asarray(species_pool, dtype=int),
        effort_unit={g: "m2" for g in gears},
        report={"zero_total_cells_dropped": int((~keep).sum()), "n_cells": int(keep.sum())},
    )


def factor_support(cells: Cells) -> pd.DataFrame:
    """How much data stands behind each non-reference gear x species factor.

    Returns one row per gear (not the reference) x species with
    ``n_groups``: cells where this gear fished together with another gear and the
    species' group total was > 0, and ``n_caught``: fish of the species this gear
    caught in those cells.
    """
    rows = []
    multi = cells.present.sum(axis=1) >= 2
    for g in range(1, cells.n_gears):
        used = cells.present[:, g] & multi
        n_groups = np.bincount(cells.cell_species[used], minlength=cells.n_species)
        n_caught = np.bincount(cells.cell_species[used], weights=cells.counts[used, g], minlength=cells.n_species)
        for s in range(cells.n_species):
            rows.append((cells.gears[g], cells.species[s], int(n_groups[s]), int(n_caught[s])))
    return pd.DataFrame(rows, columns=["gear", "species", "n_groups", "n_caught"])
