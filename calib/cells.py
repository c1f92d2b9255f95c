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


# --------------------------------------------------------------------------- length classes


@dataclass
class LengthCells:
    """Calibration cells per group x species x length class (design sections 3 and 5).

    ``cells`` is an ordinary :class:`Cells` whose *species* axis holds one entry per species x
    length class (a *stratum*, labelled ``"species | 40 mm"``), so every per-species tool
    (factor_support, the split check) works per class unchanged. Its counts are the *measured*
    fish of the class; its weight is the relative effort times the measured fraction,

        w_igs = sum over hauls h of gear g in group i of (e_h / ebar_i) * f_hs,
        f_hs  = measured_hs / count_hs   (1 when count_hs = 0: nothing to measure),

    so a subsampled haul is expected to show f times the fish of a fully measured one. A haul x
    species with count > 0 but no lengths has f = 0: it is left out of the length model (a gear
    left with w = 0 in a group is masked there) and counted in ``report['no_lengths_*']``.

    species : the fish species (in order); stratum_species (n_strata,) index into it;
    stratum_length (n_strata,) class lower bound (mm); bin_mm the class width (mm);
    species_range : species -> (lowest class lower bound, upper edge of the highest class) in mm,
        the calibrated length range; classes : species -> list of class lower bounds (mm);
    input_resolution : species -> width (mm) of the input length classes (0 when one length only);
    species_pool : (n_species,) pooling group of each species (into ``cells.pool_groups``).
    """

    cells: Cells
    species: list[str]
    stratum_species: np.ndarray
    stratum_length: np.ndarray
    bin_mm: float
    species_range: dict
    classes: dict
    input_resolution: dict
    species_pool: np.ndarray
    report: dict = field(default_factory=dict)

    def stratum_frame(self) -> pd.DataFrame:
        """One row per stratum: stratum (label), species, length_mm (class lower bound)."""
        return pd.DataFrame({
            "stratum": self.cells.species,
            "species": np.asarray(self.species, dtype=object)[self.stratum_species],
            "length_mm": self.stratum_length,
        })


def stratum_label(species: str, lower_mm: float) -> str:
    """Label of one species x length class, e.g. ``'pinfish | 40 mm'``."""
    return f"{species} | {lower_mm:g} mm"


def _resolution(values: np.ndarray) -> float:
    """Width of the input length classes (mm): the greatest common step between distinct lengths.

    Whole-mm lengths give the gcd of their differences (1 for individually measured fish, 5 for
    5-mm classes); other lengths the smallest gap. 0 when there is a single distinct length.
    """
    u = np.unique(np.asarray(values, dtype=float))
    if len(u) < 2:
        return 0.0
    gaps = np.diff(u)
    scaled = np.rint(gaps * 10)  # tenths of a mm: lengths given to 0.1 mm stay exact
    if np.allclose(gaps * 10, scaled, atol=1e-6):
        return float(np.gcd.reduce(scaled.astype(np.int64))) / 10.0
    return float(gaps.min())


def length_class_of(length_mm, bin_mm: float) -> np.ndarray:
    """Lower bound (mm) of the fit length class holding each length: floor(length / bin) * bin."""
    x = np.asarray(length_mm, dtype=float)
    return np.floor(x / bin_mm + 1e-9) * bin_mm


def check_length_bin(lengths: pd.DataFrame, bin_mm: float, where: str = "lengths") -> tuple[dict, list]:
    """Input class width per species and the problems of a ``bin_mm`` finer than the input.

    A fit class must hold whole input classes: every input class [L, L + r) (r the species'
    input resolution, :func:`_resolution`) must lie inside one fit class. Returns
    (species -> resolution in mm, list of :class:`calib.errors.Problem`).
    """
    from calib.errors import Problem

    resolution, problems = {}, []
    for sp, part in lengths.groupby("species", sort=True):
        r = _resolution(part["length_mm"].to_numpy())
        resolution[str(sp)] = r
        if r <= 0:
            continue
        lo = part["length_mm"].to_numpy(dtype=float)
        straddle = length_class_of(lo, bin_mm) != length_class_of(lo + r - 1e-6, bin_mm)
        if bin_mm < r - 1e-9 or straddle.any():
            k = int(np.flatnonzero(straddle)[0]) if straddle.any() else 0
            row = part["_row"].iloc[k] if "_row" in part else None
            problems.append(Problem(
                where, None if row is None else int(row), "length_mm",
                f"species '{sp}' is recorded in {r:g}-mm length classes; --length-bin {bin_mm:g} would split "
                f"them (e.g. the class starting at {lo[k]:g} mm)",
                f"use a --length-bin that is a multiple of {r:g} mm (e.g. {max(r, bin_mm - bin_mm % r + r):g})"))
    return resolution, problems


def build_length_cells(
    hauls: pd.DataFrame,
    counts: pd.DataFrame,
    lengths: pd.DataFrame,
    reference: str,
    bin_mm: float,
    species_groups: dict[str, str] | None = None,
    min_class_fish: int = 1,
    lengths_file: str = "lengths",
) -> LengthCells:
    """Calibration cells per group x species x length class from the lengths table.

    Parameters
    ----------
    hauls : validated hauls (``Tables.hauls``); counts : zero-completed haul x species counts
        (``tables.complete_zeros``); lengths : validated lengths (haul_id, species, length_mm, n).
    reference : the reference gear (gear 0).
    bin_mm : width of the fit's length classes (mm); classes are [k * bin, (k + 1) * bin).
        Never finer than the input classes: raises ``InputError`` when a class would split an
        input class (:func:`check_length_bin`).
    species_groups : optional species -> pooling group.
    min_class_fish : the calibrated range of a species runs from its first to its last class
        with at least this many measured fish (all gears and groups together); lengths outside
        it are left out and counted in ``report['fish_outside_range']``.

    Only groups where two or more gears fished count. Returns :class:`LengthCells`.
    """
    from calib.errors import InputError

    if not bin_mm > 0:
        raise ValueError("bin_mm must be > 0 (mm)")
    resolution, problems = check_length_bin(lengths, bin_mm, lengths_file)
    if problems:
        raise InputError(problems)

    base = build_cells(hauls, counts, reference, species_groups=species_groups)
    gears, groups = base.gears, base.groups
    gear_index = {g: i for i, g in enumerate(gears)}
    group_index = {p: i for i, p in enumerate(groups)}
    n_groups, n_gears = len(groups), len(gears)
    present_gg, effort_gg = base.group_present, base.group_effort
    mean_effort = effort_gg.sum(axis=1) / np.maximum(present_gg.sum(axis=1), 1)

    cal = calibration_hauls(hauls)
    cal = cal[cal["pair_id"].isin(group_index) & cal["gear"].isin(gear_index)][["haul_id", "pair_id", "gear", "effort"]]
    species = [s for s in base.species]
    species_index = {s: i for i, s in enumerate(species)}
    n_species = len(species)

    # Measured fraction of every calibration haul x species.
    c = counts.merge(cal, on="haul_id", how="inner")
    c = c[c["species"].isin(species_index)]
    ln = lengths.merge(cal[["haul_id"]], on="haul_id", how="inner")
    measured = ln.groupby(["haul_id", "species"])["n"].sum().rename("measured")
    c = c.merge(measured, left_on=["haul_id", "species"], right_index=True, how="left")
    c["measured"] = c["measured"].fillna(0.0)
    cnt = c["count"].to_numpy(dtype=float)
    f = np.where(cnt > 0, c["measured"].to_numpy(dtype=float) / np.where(cnt > 0, cnt, 1.0), 1.0)
    no_len = (cnt > 0) & (c["measured"].to_numpy() == 0)
    gi = c["pair_id"].map(group_index).to_numpy()
    gg = c["gear"].map(gear_index).to_numpy()
    si = c["species"].map(species_index).to_numpy()
    weight = np.zeros((n_groups, n_species, n_gears))
    np.add.at(weight, (gi, si, gg), c["effort"].to_numpy(dtype=float) / mean_effort[gi] * f)
    present = present_gg[:, None, :] & (weight > 0)

    # Measured fish per group x species x class x gear.
    ln = ln.merge(cal, on="haul_id", how="left")
    ln = ln[ln["species"].isin(species_index)]
    ln["lower"] = length_class_of(ln["length_mm"].to_numpy(), bin_mm)
    usable_gs = present.sum(axis=2) >= 2  # (group, species): a split to model
    lg = ln["pair_id"].map(group_index).to_numpy()
    ls = ln["species"].map(species_index).to_numpy()
    lgear = ln["gear"].map(gear_index).to_numpy()
    in_use = usable_gs[lg, ls] & present[lg, ls, lgear]

    classes, species_range, strata = {}, {}, []
    fish_outside = {}
    for s, sp in enumerate(species):
        sel = in_use & (ls == s)
        per_class = ln.loc[sel].groupby("lower")["n"].sum()
        ok = per_class[per_class >= min_class_fish].index.to_numpy(dtype=float)
        if len(ok) == 0:
            fish_outside[sp] = int(per_class.sum())
            continue
        lo, hi = float(ok.min()), float(ok.max())
        lowers = np.round(np.arange(lo, hi + bin_mm / 2, bin_mm), 9)
        classes[sp] = [float(x) for x in lowers]
        species_range[sp] = [lo, float(hi + bin_mm)]
        fish_outside[sp] = int(per_class[(per_class.index < lo - 1e-9) | (per_class.index > hi + 1e-9)].sum())
        strata += [(s, x) for x in lowers]
    stratum_species = np.array([s for s, _ in strata], dtype=int)
    stratum_length = np.array([x for _, x in strata], dtype=float)
    labels = [stratum_label(species[s], x) for s, x in strata]
    stratum_of = {(s, round(x, 6)): k for k, (s, x) in enumerate(strata)}
    n_strata = len(strata)

    key = [stratum_of.get((s, round(x, 6)), -1) for s, x in zip(ls, ln["lower"].to_numpy())]
    key = np.asarray(key, dtype=int)
    keep = in_use & (key >= 0)
    full = np.zeros((n_groups, max(n_strata, 1), n_gears))
    np.add.at(full, (lg[keep], key[keep], lgear[keep]), ln["n"].to_numpy(dtype=float)[keep])
    full = full[:, :n_strata]
    totals = full.sum(axis=2)
    cg, ck = np.nonzero(totals > 0)
    cs = stratum_species[ck] if n_strata else np.zeros(0, dtype=int)
    pres = present[cg, cs]
    w = np.where(pres, weight[cg, cs], 0.0)
    eff = np.where(pres, effort_gg[cg], 0.0)

    labels_combo = ["+".join(g for g, p in zip(gears, row) if p) for row in pres]
    combos = sorted(set(labels_combo)) or list(base.combos)
    combo = np.array([combos.index(x) for x in labels_combo], dtype=int)

    species_pool = np.asarray(base.species_pool, dtype=int)
    cells = Cells(
        reference=reference,
        gears=list(gears),
        species=labels,
        groups=list(groups),
        combos=combos,
        pool_groups=list(base.pool_groups),
        counts=np.rint(full[cg, ck]).astype(np.int64),
        present=pres,
        weight=w,
        effort=eff,
        cell_group=cg.astype(int),
        cell_species=ck.astype(int),
        cell_combo=combo,
        species_pool=species_pool[stratum_species] if n_strata else np.zeros(0, dtype=int),
        effort_unit=dict(base.effort_unit),
        group_present=present_gg,
        group_effort=effort_gg,
    )
    no_len_frame = c.loc[no_len]
    report = {
        "bin_mm": float(bin_mm),
        "n_groups": n_groups,
        "n_cells": int(len(cg)),
        "no_lengths_haul_species": int(no_len.sum()),
        "no_lengths_fish": int(no_len_frame["count"].sum()),
        "no_lengths_by_species": {str(k): int(v) for k, v in no_len_frame.groupby("species").size().items()},
        "fish_outside_range": fish_outside,
        "species_without_range": [sp for sp in species if sp not in classes],
        "measured_fish_used": int(cells.counts.sum()),
        "unconnected_gears": base.report.get("unconnected_gears", []),
        "single_gear_groups_dropped": base.report.get("single_gear_groups_dropped", 0),
    }
    cells.report = dict(report)
    return LengthCells(cells=cells, species=species, stratum_species=stratum_species, stratum_length=stratum_length,
                       bin_mm=float(bin_mm), species_range=species_range, classes=classes,
                       input_resolution=resolution,
                       species_pool=species_pool, report=report)


# --------------------------------------------------------------------------- group covariates


@dataclass
class CovariateCells:
    """Calibration cells with group-level covariates (``calib fit --covariate NAME``).

    ``cells`` is the ordinary :class:`Cells` of :func:`build_cells` (unchanged); beside it, per cell:

    cell_level : (n_cells, n_categorical) int, the level of each categorical covariate in the
        cell's group, as an index into ``levels[name]`` (the baseline level is index 0).
    cell_value : (n_cells, n_numeric) float, the mean of each numeric covariate over the
        hauls of the cell's group (its own units).

    categorical, numeric : covariate names in the order of the columns above.
    levels : name -> levels, baseline first (the most common level among the calibration
        groups; ties go to the first in sorted order), then the others sorted.
    centre, scale : numeric name -> mean and sd (sd 1 when 0) of the group values over the
        calibration groups; the model uses (value - centre) / scale.
    percentiles : numeric name -> the group values' 10th, 50th and 90th percentiles (the values
        factors.csv reports factors at).
    group_values : one row per calibration group (pair_id) with each covariate's group value.
    """

    cells: Cells
    categorical: list[str]
    numeric: list[str]
    levels: dict
    cell_level: np.ndarray
    cell_value: np.ndarray
    centre: dict
    scale: dict
    percentiles: dict
    group_values: pd.DataFrame
    n_groups_per_level: dict = field(default_factory=dict)

    @property
    def baseline(self) -> dict:
        return {c: self.levels[c][0] for c in self.categorical}


COVARIATE_PERCENTILES = (10, 50, 90)


def is_numeric_covariate(values: pd.Series) -> bool:
    """A covariate is numeric when its column holds numbers (not booleans); otherwise categorical."""
    return bool(pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values))


def build_covariate_cells(
    hauls: pd.DataFrame,
    counts: pd.DataFrame,
    reference: str,
    covariates: list[str],
    species_groups: dict[str, str] | None = None,
    hauls_file: str = "hauls",
) -> CovariateCells:
    """Calibration cells plus each group's covariate values (design sections 3 and 5).

    covariates : hauls columns to use. A column of numbers is numeric (its group value is the mean
        over the group's hauls); any other column is categorical, and every haul of a calibration
        group must then have the same level, else ``InputError`` names the groups, their rows and
        the fix. A blank value in a calibration haul is an error too (a group needs its value).
    Returns :class:`CovariateCells`.
    """
    from calib.errors import InputError, Problem

    problems = []
    structural = {"haul_id", "gear", "date", "effort", "effort_unit", "pair_id", "_row", "year"}
    seen = set()
    for name in covariates:
        if name in seen:
            problems.append(Problem(hauls_file, None, name, f"--covariate {name} is given twice", "give it once"))
        seen.add(name)
        if name not in hauls.columns:
            from calib.convert import STRUCTURAL_COLUMNS

            have = ", ".join(c for c in hauls.columns if c not in STRUCTURAL_COLUMNS and not c.startswith("_"))
            problems.append(Problem(hauls_file, None, name, f"--covariate {name}: no such column in the hauls table",
                                    f"name a column of the hauls table (columns besides the required ones: "
                                    f"{have or 'none'})"))
        elif name in structural:
            problems.append(Problem(hauls_file, None, name, f"'{name}' is a required hauls column, not a covariate",
                                    "name another column (e.g. day_night, habitat, depth_m)"))
    safe = {}
    for name in covariates:  # posterior variable names use letters, digits and '_' only
        key = "".join(ch if ch.isalnum() or ch == "_" else "_" for ch in str(name))
        if key in safe and safe[key] != name:
            problems.append(Problem(hauls_file, None, name, f"covariates '{safe[key]}' and '{name}' differ only in "
                                    "punctuation or spaces", "rename one of the columns"))
        safe[key] = name
    if problems:
        raise InputError(problems)

    base = build_cells(hauls, counts, reference, species_groups=species_groups)
    group_index = {p: i for i, p in enumerate(base.groups)}
    cal = calibration_hauls(hauls)
    cal = cal[cal["pair_id"].isin(group_index) & cal["gear"].isin(base.gears)]
    row_of = cal["_row"] if "_row" in cal else pd.Series(np.arange(len(cal)) + 1, index=cal.index)

    categorical = [c for c in covariates if not is_numeric_covariate(hauls[c])]
    numeric = [c for c in covariates if is_numeric_covariate(hauls[c])]
    group_values = pd.DataFrame({"pair_id": base.groups})
    levels, centre, scale, percentiles, per_level = {}, {}, {}, {}, {}

    for name in covariates:
        blank = cal[name].isna() | (cal[name].astype("string").str.strip() == "")
        if blank.any():
            rows = row_of[blank].astype(int).tolist()
            groups_b = sorted(cal.loc[blank, "pair_id"].astype(str).unique())
            problems.append(Problem(
                hauls_file, rows[0], name,
                f"covariate '{name}' is blank in {int(blank.sum())} calibration haul(s) (rows {_list_text(rows)}; "
                f"groups {_list_text(groups_b)})",
                f"fill in '{name}' for every haul of those calibration groups, or leave out --covariate {name}"))
            continue
        if name in categorical:
            text = cal[name].astype("string").str.strip()
            n_levels = text.groupby(cal["pair_id"]).nunique()
            mixed = sorted(n_levels[n_levels > 1].index.astype(str))
            if mixed:
                sel = cal["pair_id"].astype(str).isin(mixed)
                rows = row_of[sel].astype(int).tolist()
                detail = "; ".join(
                    f"{p}: " + ", ".join(sorted(set(text[sel & (cal['pair_id'].astype(str) == p)])))
                    for p in mixed[:5])
                problems.append(Problem(
                    hauls_file, rows[0], name,
                    f"categorical covariate '{name}' differs between hauls of the same calibration group in "
                    f"{len(mixed)} group(s) ({detail}{'; ...' if len(mixed) > 5 else ''}; rows {_list_text(rows)})",
                    f"give every haul of a group the same '{name}' (a group is one place and time), split the group "
                    "into groups of one level each (different pair_id), or leave out --covariate " + name))
                continue
            per_group = text.groupby(cal["pair_id"]).first()
            values = per_group.reindex(base.groups)
            freq = values.value_counts()
            order = sorted(freq.index, key=lambda v: (-int(freq[v]), str(v)))
            baseline = order[0]
            levels[name] = [str(baseline)] + sorted(str(v) for v in freq.index if v != baseline)
            per_level[name] = {lv: int(freq.get(lv, 0)) for lv in levels[name]}
            group_values[name] = values.astype(str).to_numpy()
        else:
            per_group = cal[name].astype(float).groupby(cal["pair_id"]).mean().reindex(base.groups)
            v = per_group.to_numpy(dtype=float)
            centre[name] = float(v.mean())
            sd = float(v.std(ddof=1)) if len(v) > 1 else 0.0
            scale[name] = sd if sd > 0 else 1.0
            percentiles[name] = [float(x) for x in np.percentile(v, COVARIATE_PERCENTILES)]
            group_values[name] = v
    if problems:
        raise InputError(problems)

    gi = base.cell_group
    cell_level = np.zeros((base.n_cells, len(categorical)), dtype=np.int64)
    for k, name in enumerate(categorical):
        idx = {lv: i for i, lv in enumerate(levels[name])}
        cell_level[:, k] = np.array([idx[x] for x in group_values[name]], dtype=np.int64)[gi]
    cell_value = np.zeros((base.n_cells, len(numeric)))
    for k, name in enumerate(numeric):
        cell_value[:, k] = group_values[name].to_numpy(dtype=float)[gi]
    return CovariateCells(cells=base, categorical=categorical, numeric=numeric, levels=levels,
                          cell_level=cell_level, cell_value=cell_value, centre=centre, scale=scale,
                          percentiles=percentiles, group_values=group_values, n_groups_per_level=per_level)


def _list_text(items, limit: int = 12) -> str:
    items = [str(x) for x in items]
    return ", ".join(items[:limit]) + (f", ... ({len(items)} in all)" if len(items) > limit else "")


def species_view(lc):
    """The length-class cells of :class:`calib.cells.LengthCells` with theta per species only.

    Same cells (group x species x length class of measured fish, same counts, weights with the
    measured-fraction offset, same order), but every class of a species points at the species:
    a model fitted to this view has a factor that does not change with length. So the constant
    model fitted here and the length model fitted to ``lc`` are scored on the same observations.
    """
    from dataclasses import replace

    cells = lc.cells
    stratum_species = np.asarray(lc.stratum_species, dtype=np.int64)
    return replace(cells, species=list(lc.species), cell_species=stratum_species[np.asarray(cells.cell_species)],
                   species_pool=np.asarray(lc.species_pool, dtype=np.int64))
