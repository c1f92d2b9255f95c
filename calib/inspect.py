"""What is in the validated tables: the summary ``calib check`` prints.

Reads a :class:`calib.tables.Tables` and reports hauls per gear, calibration groups
per gear combination, species catches and how many groups caught them, and warnings
that do not stop a command (rare species, unlinked gears, groups on different days or
far apart, mixed effort units, and every fit-only rule of
:func:`calib.tables.fit_problems`). For pooled partner data it also reports what the
intake tables did and did not cover: sources with no recording list, catches of species
a source did not record, species that appear in one source only, and names that differ
only in case or spacing.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from calib.cells import calibration_hauls, connected_to, gear_graph
from calib.errors import Warning_
from calib.tables import Tables, complete_zeros, fit_problems, unrecorded_catches

# Mean Earth radius R1 = 6371.0088 km (Moritz 2000, "Geodetic Reference System 1980",
# Journal of Geodesy 74; value recalled from memory). A sphere is close enough for a 2 km check.
EARTH_RADIUS_KM = 6371.0088

# Thresholds below are common practice, no source.
DEFAULT_MIN_GROUPS = 10  # fewer groups with a non-zero total: too rare to calibrate on its own
DEFAULT_MAX_DISTANCE_KM = 2.0  # hauls of one calibration group further apart: not the same place

NO_SPECIES_RECORDED_NOTE = ("no species_recorded table: every species is assumed recorded by every "
                            "source, so a species missing from a haul counts as a zero catch")


def haversine_km(lat1, lon1, lat2, lon2) -> np.ndarray:
    """Great-circle distance in km between points given in decimal degrees (arrays broadcast)."""
    p1, p2 = np.radians(lat1), np.radians(lat2)
    dphi = p2 - p1
    dlmb = np.radians(np.asarray(lon2) - np.asarray(lon1))
    a = np.sin(dphi / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dlmb / 2) ** 2
    return 2 * EARTH_RADIUS_KM * np.arcsin(np.sqrt(np.clip(a, 0.0, 1.0)))


@dataclass
class CheckSummary:
    """What ``calib check`` found. Counts are hauls, groups or fish; catches are as given.

    ``groups`` in the species rows means calibration groups with two or more gears (the
    groups a fit can use) in which the species' total catch was > 0.
    """

    files: dict[str, str]
    reference: str | None
    n_hauls: int
    n_calibration_hauls: int
    n_catch_rows: int
    n_length_rows: int | None
    gears: list[dict]
    combos: list[dict]
    n_groups: int
    n_usable_groups: int
    groups_with_summed_hauls: int
    species: list[dict]
    connected_sets: list[list[str]]
    hauls_without_catches: int
    min_groups: int
    max_distance_km: float
    notes: list[str] = field(default_factory=list)
    warnings: list[Warning_] = field(default_factory=list)
    warning_kinds: list[str] = field(default_factory=list)  # one per warning: the rule that raised it
    n_species_recorded_rows: int | None = None  # None when no species_recorded table was given
    n_species_names_rows: int | None = None  # None when no species_names table was given

    def as_dict(self) -> dict:
        """Plain dict (JSON-serialisable) of everything in the summary."""
        return {
            "files": dict(self.files),
            "reference": self.reference,
            "n_hauls": self.n_hauls,
            "n_calibration_hauls": self.n_calibration_hauls,
            "n_catch_rows": self.n_catch_rows,
            "n_length_rows": self.n_length_rows,
            "n_species_recorded_rows": self.n_species_recorded_rows,
            "n_species_names_rows": self.n_species_names_rows,
            "gears": [dict(g) for g in self.gears],
            "combos": [dict(c) for c in self.combos],
            "n_groups": self.n_groups,
            "n_usable_groups": self.n_usable_groups,
            "groups_with_summed_hauls": self.groups_with_summed_hauls,
            "species": [dict(s, by_gear=dict(s["by_gear"])) for s in self.species],
            "connected_sets": [list(s) for s in self.connected_sets],
            "hauls_without_catches": self.hauls_without_catches,
            "min_groups": self.min_groups,
            "max_distance_km": self.max_distance_km,
            "notes": list(self.notes),
            "warnings": [{"kind": k, "message": w.message, "file": w.file, "row": w.row, "column": w.column}
                         for k, w in zip(self.warning_kinds, self.warnings)],
        }

    def text(self, max_per_kind: int = 20) -> str:
        """Readable plain-text summary. At most ``max_per_kind`` warnings of one kind are
        printed; the rest are counted (all are in ``warnings`` and ``as_dict()``)."""
        lines = ["calib check"]
        width = max([8] + [len(r) for r in self.files])
        for role, path in self.files.items():
            n = {"hauls": self.n_hauls, "catches": self.n_catch_rows, "lengths": self.n_length_rows,
                 "species_recorded": self.n_species_recorded_rows,
                 "species_names": self.n_species_names_rows}.get(role)
            lines.append(f"  {role:<{width}} {path} ({n} rows)")
        lines.append("")
        lines.append(f"Hauls: {self.n_hauls}, of which {self.n_calibration_hauls} in calibration groups")
        lines += _table(
            ["gear", "hauls", "in groups", "effort unit", "first date", "last date"],
            [[g["gear"], g["n_hauls"], g["n_calibration_hauls"], ", ".join(g["effort_units"]),
              g["first_date"], g["last_date"]] for g in self.gears],
            right={1, 2})
        lines.append("")
        lines.append(f"Calibration groups (hauls sharing a pair_id): {self.n_groups}, "
                     f"{self.n_usable_groups} with two or more gears")
        for c in self.combos:
            tail = "" if c["usable"] else " (one gear only: fit cannot use these)"
            lines.append(f"  {c['label']}: {c['n_groups']} group{'s' if c['n_groups'] != 1 else ''}{tail}")
        lines.append(f"  groups where several hauls of one gear were summed: {self.groups_with_summed_hauls}")
        lines.append("")
        if self.reference is not None and not any(g["gear"] == self.reference for g in self.gears):
            lines.append(f"Reference gear '{self.reference}': not a gear in the hauls table")
        elif self.reference is not None:
            linked = next((s for s in self.connected_sets if self.reference in s), [])
            others = [g for g in linked if g != self.reference]
            lines.append(f"Reference gear '{self.reference}': linked through calibration groups to "
                         + (", ".join(others) if others else "no other gear"))
        else:
            lines.append("Gears linked through calibration groups (factors relate gears within one set):")
            for i, s in enumerate(self.connected_sets, start=1):
                lines.append(f"  set {i}: {', '.join(s)}")
        lines.append("")
        usable_gears = sorted({g for c in self.combos if c["usable"] for g in c["gears"]})
        lines.append("Species (catch: sum of counts; groups: calibration groups with two or more gears "
                     "and a non-zero total;")
        lines.append("         per gear: how many of those groups the gear caught it in)")
        lines += _table(
            ["species", "catch", "catch in groups", "groups"] + usable_gears,
            [[s["species"], _num(s["total_catch"]), _num(s["calibration_catch"]), s["n_groups"]]
             + [s["by_gear"].get(g, 0) for g in usable_gears] for s in self.species],
            right=set(range(1, 4 + len(usable_gears))))
        lines.append("")
        lines.append("Notes")
        for note in self.notes:
            lines.append(f"  - {note}")
        lines.append("")
        if not self.warnings:
            lines.append("Warnings: none")
        else:
            lines.append(f"Warnings ({len(self.warnings)})")
            shown: dict[str, int] = {}
            hidden: dict[str, int] = {}
            for kind, w in zip(self.warning_kinds, self.warnings):
                if shown.get(kind, 0) < max_per_kind:
                    shown[kind] = shown.get(kind, 0) + 1
                    lines.append(f"  - {w}")
                else:
                    hidden[kind] = hidden.get(kind, 0) + 1
            for kind, n in hidden.items():
                lines.append(f"  ... and {n} more warnings of the kind '{kind}'")
        return "\n".join(lines)


def _num(x: float) -> str:
    return f"{x:g}" if float(x).is_integer() else f"{x:.1f}"


def _table(header: list[str], rows: list[list], right: set[int]) -> list[str]:
    cells = [header] + [[str(v) for v in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    out = []
    for r in cells:
        out.append("  " + "  ".join(v.rjust(w) if i in right else v.ljust(w)
                                    for i, (v, w) in enumerate(zip(r, widths))).rstrip())
    return out


def _components(graph: dict[str, set[str]], gears) -> list[list[str]]:
    left = set(gears)
    sets = []
    while left:
        start = min(left)
        comp = connected_to(start, graph) & set(gears)
        sets.append(sorted(comp))
        left -= comp
    return sorted(sets, key=lambda s: (-len(s), s))


def summarize(
    tables: Tables,
    reference: str | None = None,
    min_groups: int = DEFAULT_MIN_GROUPS,
    max_distance_km: float = DEFAULT_MAX_DISTANCE_KM,
) -> CheckSummary:
    """Summarise validated tables for ``calib check``.

    Parameters
    ----------
    tables : from :func:`calib.tables.load_tables`.
    reference : optional reference gear; gears not linked to it are warned about, and the
        fit-only rules that need a reference are included.
    min_groups : a species with a non-zero total in fewer calibration groups than this is
        warned about as too rare to calibrate (common practice, no source).
    max_distance_km : warn about calibration groups whose hauls are further apart (km,
        great-circle, from latitude/longitude where given; common practice, no source).
    """
    hauls, catches = tables.hauls, tables.catches
    hf = tables.files["hauls"]
    cal = calibration_hauls(hauls)
    warnings: list[tuple[str, Warning_]] = []  # (kind, warning)

    gears = []
    for gear, g in hauls.groupby("gear", sort=True):
        gears.append({
            "gear": gear,
            "n_hauls": int(len(g)),
            "n_calibration_hauls": int(g["haul_id"].isin(cal["haul_id"]).sum()),
            "effort_units": sorted(g["effort_unit"].unique()),
            "first_date": f"{g['date'].min():%Y-%m-%d}",
            "last_date": f"{g['date'].max():%Y-%m-%d}",
        })

    gears_of_group = cal.groupby("pair_id", sort=True)["gear"].agg(lambda s: tuple(sorted(set(s))))
    combo_counts = gears_of_group.value_counts()
    combos = [{"gears": list(k), "label": " + ".join(k) if len(k) > 1 else f"{k[0]} only",
               "n_groups": int(n), "usable": len(k) > 1} for k, n in combo_counts.items()]
    combos.sort(key=lambda c: (not c["usable"], -c["n_groups"], c["label"]))
    usable = gears_of_group[gears_of_group.map(len) > 1].index
    hauls_per = cal.groupby(["pair_id", "gear"]).size()
    summed = int(hauls_per[hauls_per > 1].index.get_level_values("pair_id").nunique())

    # Species: totals over all hauls and per usable group x gear.
    counts = complete_zeros(tables)
    in_groups = counts.merge(cal[["haul_id", "pair_id", "gear"]], on="haul_id", how="inner")
    in_groups = in_groups[in_groups["pair_id"].isin(usable)]
    per_gear = in_groups.groupby(["species", "pair_id", "gear"], sort=True)["count"].sum()
    group_total = per_gear.groupby(level=["species", "pair_id"]).sum()
    caught_groups = group_total[group_total > 0]
    species = []
    for sp in sorted(counts["species"].unique()):
        total = float(catches.loc[catches["species"] == sp, "count"].sum())
        n_groups = int((caught_groups.index.get_level_values("species") == sp).sum())
        by_gear: dict[str, int] = {}
        if n_groups:
            pg = per_gear.loc[sp]
            pg = pg[pg.index.get_level_values("pair_id").isin(caught_groups.loc[sp].index)]
            by_gear = {g: int(v) for g, v in (pg > 0).groupby(level="gear").sum().items()}
        species.append({"species": sp, "total_catch": total,
                        "calibration_catch": float(group_total.loc[sp].sum()) if sp in group_total.index else 0.0,
                        "n_groups": n_groups, "by_gear": by_gear})
        if n_groups < min_groups:
            warnings.append(("rare species", Warning_(
                f"species '{sp}' has a non-zero total in {n_groups} calibration group"
                f"{'s' if n_groups != 1 else ''} (fewer than {min_groups}): too few to calibrate it on its "
                "own; its factor would rest mostly on the other species", tables.files["catches"], None,
                "species")))

    graph = gear_graph(hauls)
    cal_gears = sorted(cal["gear"].unique())
    sets = _components(graph, cal_gears)
    if reference is None and len(sets) > 1:
        warnings.append(("unlinked gears", Warning_(
            f"the gears fall into {len(sets)} sets that no calibration group links ("
            + " | ".join(", ".join(s) for s in sets) + "); factors can only relate gears within one set",
            hf, None, "gear")))
    for gear in sorted(set(hauls["gear"]) - set(cal_gears)):
        warnings.append(("gear in no group", Warning_(
            f"gear '{gear}' is in no calibration group: no factor can be fitted for it, "
            "so its records cannot be converted", hf, None, "gear")))

    warnings += _group_place_time_warnings(cal, hf, max_distance_km)

    problems = fit_problems(tables, reference)
    mixed_in_cal = {g for g, u in cal.groupby("gear")["effort_unit"] if u.nunique() > 1}
    for w in tables.warnings:
        if w.column == "effort_unit" and any(w.message.startswith(f"gear '{g}' ") for g in mixed_in_cal):
            continue  # the fit-only rule below says the same about the calibration hauls
        warnings.append(("table", w))
    for p in problems:
        warnings.append(("fit will stop", Warning_(f"{p.message}; fit stops on this. Fix: {p.fix}",
                                                   p.file, p.row, p.column)))

    intake_notes, intake_warnings = _intake_report(tables, counts)
    warnings += intake_warnings

    no_catch = int((~hauls["haul_id"].isin(catches["haul_id"])).sum())
    notes = intake_notes
    if no_catch:
        notes.append(f"{no_catch} haul{'s have' if no_catch != 1 else ' has'} no row in catches: "
                     "every species counts as zero there")
    if tables.lengths is None:
        notes.append("no lengths table: species-level fits only")
    return CheckSummary(
        files=dict(tables.files),
        reference=reference,
        n_hauls=int(len(hauls)),
        n_calibration_hauls=int(len(cal)),
        n_catch_rows=int(len(catches)),
        n_length_rows=None if tables.lengths is None else int(len(tables.lengths)),
        gears=gears,
        combos=combos,
        n_groups=int(len(gears_of_group)),
        n_usable_groups=int(len(usable)),
        groups_with_summed_hauls=summed,
        species=species,
        connected_sets=sets,
        hauls_without_catches=no_catch,
        min_groups=min_groups,
        max_distance_km=max_distance_km,
        notes=notes,
        warnings=[w for _, w in warnings],
        warning_kinds=[k for k, _ in warnings],
        n_species_recorded_rows=None if tables.species_recorded is None else int(len(tables.species_recorded)),
        n_species_names_rows=None if tables.species_names is None else int(len(tables.species_names)),
    )


def _source_label(source) -> str:
    return "(blank)" if pd.isna(source) else f"'{source}'"


def _intake_report(tables: Tables, counts: pd.DataFrame) -> tuple[list[str], list[tuple[str, Warning_]]]:
    """Notes and warnings about pooled partner data (design section 3, issue 3 item 1).

    ``counts`` is the zero-completed table (``complete_zeros(tables)``).
    """
    hauls, catches = tables.hauls, tables.catches
    hf, cf = tables.files["hauls"], tables.files["catches"]
    notes: list[str] = []
    warnings: list[tuple[str, Warning_]] = []
    n_species = int(catches["species"].nunique())

    sr = tables.species_recorded
    if sr is None:
        notes.append(NO_SPECIES_RECORDED_NOTE)
    else:
        listed = set(sr["source"])
        not_filled = len(hauls) * n_species - len(counts)
        notes.append(f"species_recorded: recording lists for {len(listed & set(hauls['source'].dropna()))} "
                     f"source(s); zeros are filled only for species a haul's source recorded in the haul's "
                     f"year ({not_filled} haul x species zero(s) not filled)")
        per_source = hauls.groupby("source", dropna=False, sort=True).size()
        for source, n in per_source.items():
            if source in listed:
                continue
            what = (f"{n} haul(s) have a blank source" if pd.isna(source)
                    else f"source {_source_label(source)} ({n} haul{'s' if n != 1 else ''}) has no rows in "
                         "species_recorded")
            warnings.append(("no recording list", Warning_(
                f"{what}: every species is assumed recorded there, so a species missing from those hauls "
                "counts as a zero catch; add its recording list if it logged only some species", hf, None, "source")))
        bad = unrecorded_catches(tables)
        if len(bad):
            info = bad.merge(hauls[["haul_id", "source", "year"]], on="haul_id", how="left")
            for (source, sp), g in info.groupby(["source", "species"], sort=True, dropna=False):
                years = sorted(g["year"].unique())
                shown = ", ".join(str(y) for y in years[:5]) + (" ..." if len(years) > 5 else "")
                warnings.append(("not recorded", Warning_(
                    f"{len(g)} catches row(s) of '{sp}' from source {_source_label(source)} in year(s) {shown} "
                    f"that species_recorded does not list for it (e.g. row {int(g['_row'].min())}); without that "
                    "source's zeros such counts would bias a mean upward, so convert rejects them; add the "
                    "species and years to species_recorded if the source did record it",
                    cf, int(g["_row"].min()), "species")))

    if tables.species_names is not None:
        ren = tables.renamed
        by_table = ren.groupby("table")["n_rows"].sum() if len(ren) else pd.Series(dtype="int64")
        if len(ren):
            parts = ", ".join(f"{int(n)} {t} row(s)" for t, n in by_table.items())
            notes.append(f"species_names: {ren['name'].nunique()} name(s) as written mapped to "
                         f"{ren['accepted_name'].nunique()} accepted name(s) ({parts} renamed)")
        else:
            notes.append("species_names: no name in the tables needed mapping")

    caught = catches[catches["count"] > 0].merge(hauls[["haul_id", "source"]], on="haul_id", how="left")
    if hauls["source"].dropna().nunique() >= 2:
        sources_of = caught.dropna(subset=["source"]).groupby("species")["source"].agg(["nunique", "first", "size"])
        for sp, r in sources_of[sources_of["nunique"] == 1].iterrows():
            warnings.append(("one source only", Warning_(
                f"species '{sp}' was caught in one source only ({_source_label(r['first'])}, {int(r['size'])} "
                "catches row(s)); check whether other partners write it under another name (species_names "
                "maps names) or did not record it", cf, None, "species")))
    return notes, warnings


def _group_place_time_warnings(cal: pd.DataFrame, file: str, max_km: float) -> list[tuple[str, Warning_]]:
    """Calibration groups whose hauls were on different days or more than ``max_km`` apart."""
    out = []
    for pid, g in cal.groupby("pair_id", sort=True):
        days = g["date"].dt.normalize().unique()
        if len(days) > 1:
            shown = ", ".join(f"{d:%Y-%m-%d}" for d in sorted(days))
            out.append(("different dates", Warning_(
                f"calibration group '{pid}' has hauls on {len(days)} days ({shown}); "
                "gears compared on different days may not have sampled the same animals",
                file, int(g["_row"].min()), "date")))
        pos = g.dropna(subset=["latitude", "longitude"])
        if len(pos) > 1:
            lat, lon = pos["latitude"].to_numpy(), pos["longitude"].to_numpy()
            d = haversine_km(lat[:, None], lon[:, None], lat[None, :], lon[None, :])
            far = float(d.max())
            if far > max_km:
                out.append(("far apart", Warning_(
                    f"calibration group '{pid}' has hauls {far:.1f} km apart (more than "
                    f"{max_km:g} km); gears that far apart may not have sampled the same animals",
                    file, int(pos["_row"].min()), "latitude")))
    return out
