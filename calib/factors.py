"""Stage 4: the factor set — conversion factors, their draws and how they were made.

Every fitting method (hierarchical model, ratio, glm) ends here, in one
:class:`FactorSet` with the same table, the same draws format and the same
manifest. A factor set is saved as a directory:

    factors.csv    one row per species x gear: the factor cpue_ref / cpue_gear and its checks
    checks.csv     the per-factor diagnostics behind ``status`` (incl. the posterior predictive p)
    posterior.nc   ArviZ InferenceData; posterior["theta"] (chain, draw, gear, species),
                   theta = log(q_gear / q_ref), so factor = exp(-theta)
    manifest.json  inputs (hashes), model spec, priors, settings, seed, divergences,
                   software versions, timestamp and the factor-set id
"""

from __future__ import annotations

import hashlib
import json
import platform
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd

from calib.outputs import atomic_directory

FACTOR_COLUMNS = [
    "species",
    "gear",
    "reference",
    "effort_unit",
    "length_mm",
    "covariate",
    "level",
    "factor_median",
    "factor_lower",
    "factor_upper",
    "interval",
    "n_groups",
    "n_caught",
    "rhat",
    "ess_bulk",
    "ess_tail",
    "prior_ratio",
    "status",
    "reason",
]

# Optional result tables a factor set may carry (saved as NAME.csv).
EXTRA_TABLES = ("length_split", "covariate_effects", "comparison", "spread_check")

CAUTION = (
    "Conversion factors hold only for the gears, size range, habitats and seasons of the "
    "calibration study they were fitted on. Defer to the survey program's own standards and "
    "to qualified review before any management use."
)


def file_sha256(path: str | Path) -> str:
    """SHA-256 of a file's bytes (hex)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def software_versions() -> dict[str, str]:
    """Versions of Python and the libraries a fit depends on."""
    import importlib.metadata as md

    versions = {"python": platform.python_version()}
    for pkg in ("calib", "numpy", "pandas", "scipy", "statsmodels", "pymc", "pytensor", "arviz", "xarray"):
        try:
            versions[pkg] = md.version(pkg)
        except md.PackageNotFoundError:
            versions[pkg] = "not installed"
    return versions


def assemble_factor_set(tables, table: pd.DataFrame, checks: pd.DataFrame, idata, *, method: str,
                        reference: str, effort_unit: dict, model: dict, settings: dict, rules, divergences,
                        cells_report: dict, gears, species, species_groups, extra: dict | None = None,
                        domain_hauls: pd.DataFrame | None = None, **factor_set_fields) -> "FactorSet":
    """The manifest every fit writes, and the FactorSet around it (one place for all fit variants).

    Manifest: the inputs by path and SHA-256, the model spec, sampler settings, status rules,
    divergences, the cells report, gears, species, species groups, ``extra`` entries of the
    variant (patchiness, design, lengths, covariates, ...), software versions, the calibration
    domain (months and covariate ranges of ``domain_hauls``, default the tables' hauls, so convert
    can flag records outside it), a timestamp and the factor-set id. ``factor_set_fields`` go to
    the FactorSet (e.g. ``extra_tables``, ``cells``).
    """
    from dataclasses import asdict

    from calib.convert import calibration_domain

    manifest = {
        "tool": "calib",
        "method": method,
        "reference": reference,
        "reference_effort_unit": effort_unit.get(reference, ""),
        "inputs": {role: {"path": str(p), "sha256": file_sha256(p)} for role, p in tables.files.items()
                   if p is not None and Path(p).exists()},
        "model": model,
        "settings": settings,
        "status_rules": asdict(rules),
        "divergences": divergences,
        "cells": dict(cells_report),
        "gears": gears,
        "species": species,
        "species_groups": species_groups,
        **(extra or {}),
        "versions": software_versions(),
    }
    manifest["domain"] = calibration_domain(tables.hauls if domain_hauls is None else domain_hauls)
    manifest["timestamp"] = utc_timestamp()
    manifest["factor_set_id"] = factor_set_id(manifest, table)
    idata.posterior.attrs["factor_set_id"] = manifest["factor_set_id"]
    return FactorSet(table=table, checks=checks, idata=idata, manifest=manifest, **factor_set_fields)


def factor_set_id(manifest: dict, table: pd.DataFrame) -> str:
    """Hash of the manifest (without its timestamp) and the factor table.

    The timestamp and the input paths are left out so the same input files (by content),
    settings and seed give the same id.
    """
    content = {k: v for k, v in manifest.items() if k not in ("timestamp", "factor_set_id")}
    # Inputs count by content, not by where they happen to be on disk.
    content["inputs"] = {role: meta.get("sha256") for role, meta in manifest.get("inputs", {}).items()}
    payload = json.dumps(content, sort_keys=True, default=str) + table.to_csv(index=False)
    return "fs-" + hashlib.sha256(payload.encode()).hexdigest()[:16]


def summarise_theta_draws(theta, interval: float) -> pd.DataFrame:
    """Factor median and equal-tailed interval per gear x species from theta draws.

    ``theta``: xarray DataArray (chain, draw, gear, species) of log(q_gear/q_ref).
    Returns columns gear, species, factor_median, factor_lower, factor_upper.
    """
    stacked = theta.stack(sample=("chain", "draw")).transpose("gear", "species", "sample").values
    factor = np.exp(-stacked)
    lo_q, hi_q = (1 - interval) / 2, 1 - (1 - interval) / 2
    with np.errstate(invalid="ignore"):
        med = np.nanmedian(factor, axis=2) if np.isfinite(factor).any() else np.full(factor.shape[:2], np.nan)
        lo = np.nanquantile(factor, lo_q, axis=2)
        hi = np.nanquantile(factor, hi_q, axis=2)
    rows = []
    for gi, g in enumerate(theta.coords["gear"].values):
        for si, s in enumerate(theta.coords["species"].values):
            rows.append((g, s, med[gi, si], lo[gi, si], hi[gi, si]))
    return pd.DataFrame(rows, columns=["gear", "species", "factor_median", "factor_lower", "factor_upper"])


@dataclass
class FactorSet:
    """Fitted conversion factors with their draws and provenance.

    Attributes
    ----------
    table : DataFrame with the factors.csv columns (see ``FACTOR_COLUMNS``).
    checks : DataFrame of per-factor diagnostics (gear, species, rhat, ess, prior_ratio, ppp, ...).
    idata : arviz.InferenceData; ``idata.posterior["theta"]`` has dims (chain, draw, gear, species).
    manifest : dict (inputs, spec, priors, settings, seed, divergences, versions, timestamp, id).
    """

    table: pd.DataFrame
    checks: pd.DataFrame
    idata: object
    manifest: dict
    # Further result tables saved as NAME.csv beside factors.csv and read back by ``load`` (names in
    # EXTRA_TABLES): length_split (length fits), covariate_effects, comparison and spread_check (--compare).
    extra_tables: dict = field(default_factory=dict)
    # The calibration cells it was fitted from (in memory only, not saved; used by comparisons).
    cells: object = None

    @property
    def id(self) -> str:
        return self.manifest["factor_set_id"]

    @property
    def reference(self) -> str:
        return self.manifest["reference"]

    def factor_draws(self, species: str, gear: str) -> np.ndarray:
        """All draws of the factor cpue_ref/cpue_gear for one species and gear (1-D array)."""
        if gear == self.reference:
            n = self.idata.posterior.sizes["chain"] * self.idata.posterior.sizes["draw"]
            return np.ones(n)
        theta = self.idata.posterior["theta"]
        if "length" in theta.dims:
            raise ValueError("this factor set's factors depend on length: use "
                             "calib.length_fit.length_theta_draws(factor_set, species, gear)")
        theta = theta.sel(species=species, gear=gear)
        return np.exp(-theta.values.reshape(-1))

    def summary(self) -> str:
        """Plain-text summary: what was fitted and each factor with its interval and status."""
        m = self.manifest
        level = int(round(100 * m["settings"]["interval"]))
        lines = [f"Factor set {self.id}  (method: {m['method']}"
                 + (f", patchiness: {m['patchiness']}" if m.get("patchiness") else "")
                 + f", reference gear: {self.reference})"]
        lengths = m.get("lengths")
        if lengths:
            lines.append(
                f"  factors by length: {lengths['bin_mm']:g}-mm classes; {m['cells']['n_groups']} calibration groups, "
                f"{m['cells']['n_cells']} group x species x length-class cells with measured fish.")
            lines.append(
                f"  left out of the length model: {lengths['no_lengths_haul_species']} haul x species with a catch "
                f"but no lengths ({lengths['no_lengths_fish']} fish); measured fish outside the calibrated ranges: "
                f"{sum(lengths['fish_outside_range'].values())}.")
            for sp, (lo, hi) in lengths["calibrated_range_mm"].items():
                lines.append(f"  calibrated lengths of {sp}: {lo:g} to {hi:g} mm")
            if lengths.get("species_without_range"):
                lines.append("  no length factors (too few measured fish in groups with two or more gears): "
                             + ", ".join(lengths["species_without_range"]))
        elif m.get("design") == "side-by-side":  # groups are site-periods there
            c = m["cells"]
            lines.append(f"  side-by-side design, periods by {c['period_by']}: {c['n_hauls']} hauls in "
                         f"{c['n_site_periods']} site-periods, {c['n_groups']} fished by two or more gears; "
                         f"{c['hauls_in_single_gear_site_periods']} hauls in single-gear site-periods (kept; "
                         "no information on the factors).")
            lines.append("  site-periods shared per gear pair: " + ", ".join(
                f"{r['gear_a']}+{r['gear_b']} {r['n_site_periods']}" for r in c["site_periods_per_gear_pair"]))
        else:
            lines.append(
                f"  {m['cells']['n_groups']} calibration groups, {m['cells']['n_cells']} group x species cells "
                f"with a non-zero total; {m['cells']['zero_total_cells_dropped']} zero-total cells carried no "
                "information.")
        if m.get("divergences") is not None:
            lines.append(f"  divergent transitions: {m['divergences']}")
        counts = self.table["status"].value_counts()
        lines.append(
            "  status: " + ", ".join(f"{counts.get(s, 0)} {s}" for s in ("ok", "warn", "fail"))
        )
        lines.append("")
        by_length = bool(lengths)
        head = f"  {'species':<24} {'gear':<22} " + (f"{'length':>8} " if by_length else "")
        lines.append(head + f"{'factor':>8}  {level}% interval       status")
        for r in self.table.itertuples():
            if np.isfinite(r.factor_median):
                est = f"{r.factor_median:8.3g}  {r.factor_lower:7.3g} to {r.factor_upper:<8.3g}"
            else:
                est = f"{'—':>8}  {'':19}"
            where = f"{r.length_mm:>5g} mm " if by_length else ""
            lines.append(f"  {r.species:<24} {r.gear:<22} {where}{est}  {r.status}")
        lines.append("")
        lines.append("  factor = expected cpue of the reference gear / cpue of this gear at the same place and time.")
        lines.append("  " + CAUTION)
        return "\n".join(lines)

    def __repr__(self) -> str:
        return f"<FactorSet {self.id}: {len(self.table)} factors, reference {self.reference}>"

    def save(self, directory: str | Path) -> Path:
        """Write factors.csv, checks.csv, posterior.nc, manifest.json and the extra tables (NAME.csv)
        atomically into ``directory``."""
        directory = Path(directory)
        with atomic_directory(directory) as tmp:
            self.table.to_csv(tmp / "factors.csv", index=False, float_format="%.6g")
            self.checks.to_csv(tmp / "checks.csv", index=False, float_format="%.6g")
            self.idata.to_netcdf(str(tmp / "posterior.nc"), engine="h5netcdf")
            (tmp / "manifest.json").write_text(json.dumps(self.manifest, indent=2, default=str) + "\n")
            for name, frame in self.extra_tables.items():
                frame.to_csv(tmp / f"{name}.csv", index=False, float_format="%.6g")
        return directory

    @classmethod
    def load(cls, directory: str | Path) -> "FactorSet":
        """Read a factor set saved by :meth:`save`."""
        import arviz as az

        directory = Path(directory)
        missing = [f for f in ("factors.csv", "posterior.nc", "manifest.json") if not (directory / f).exists()]
        if missing:
            from calib.errors import InputError, Problem

            raise InputError(
                [
                    Problem(str(directory / f), None, None, "file not found in the factor set directory",
                            "point --factors at a directory written by `calib fit`")
                    for f in missing
                ]
            )
        table = pd.read_csv(directory / "factors.csv", keep_default_na=True)
        for col in ("length_mm", "covariate", "level", "reason"):
            if col in table and table[col].isna().all():
                table[col] = table[col].astype(object)
        checks_path = directory / "checks.csv"
        checks = pd.DataFrame()
        if checks_path.exists() and checks_path.stat().st_size > 1:
            try:
                checks = pd.read_csv(checks_path)
            except pd.errors.EmptyDataError:  # written from an empty checks frame
                checks = pd.DataFrame()
        idata = az.from_netcdf(str(directory / "posterior.nc"), engine="h5netcdf")
        manifest = json.loads((directory / "manifest.json").read_text())
        extra = {name: pd.read_csv(directory / f"{name}.csv") for name in EXTRA_TABLES
                 if (directory / f"{name}.csv").is_file()}
        return cls(table=table, checks=checks, idata=idata, manifest=manifest, extra_tables=extra)


def load_factors(directory: str | Path) -> FactorSet:
    """Read a saved factor set directory (see :class:`FactorSet`)."""
    return FactorSet.load(directory)


def utc_timestamp() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def factor_set_from_draws(theta, *, reference: str, factor_set_id: str, effort_unit: str = "m2",
                          status: str = "ok", method: str = "synthetic", interval: float = 0.9) -> FactorSet:
    """A FactorSet from known theta draws (for simulations, tests and factors fitted elsewhere).

    ``theta``: xarray DataArray (chain, draw, gear, species) of log(q_gear / q_ref) with the
    reference gear's row 0; factor = exp(-theta). Every non-reference gear x species gets one
    factors.csv row with the given ``status``; summaries are left blank (they are not needed to
    convert, which reads the draws). The calibration domain is empty, so convert flags nothing.
    """
    import arviz as az

    rows = []
    for gear in theta.coords["gear"].values:
        if gear == reference:
            continue
        for species in theta.coords["species"].values:
            row = {c: np.nan for c in FACTOR_COLUMNS}
            row.update(species=species, gear=gear, reference=reference, effort_unit=effort_unit,
                       status=status, reason="", interval=interval)
            rows.append(row)
    manifest = {"factor_set_id": factor_set_id, "reference": reference, "reference_effort_unit": effort_unit,
                "method": method, "settings": {"interval": interval}, "inputs": {},
                "domain": {"numeric": [], "categorical": [], "skipped": {}, "by_gear": {}}}
    return FactorSet(table=pd.DataFrame(rows, columns=FACTOR_COLUMNS), checks=pd.DataFrame(),
                     idata=az.InferenceData(posterior=theta.to_dataset(name="theta")), manifest=manifest)
