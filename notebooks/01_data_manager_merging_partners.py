# ---
# jupyter:
#   jupytext:
#     formats: py:percent
#     text_representation:
#       extension: .py
#       format_name: percent
#   kernelspec:
#     display_name: Python 3
#     language: python
#     name: python3
# ---

# %% [markdown]
# # Merging partner datasets into one archive
#
# *For the data manager.* Three partner programs of the (invented) Quillmarsh Monitoring
# Cooperative sample one estuary with different gears: a channel trawl survey that replaced its
# otter trawl in 2015, a shore seine survey, and a tidal creek survey that moved from a beach
# seine to the new trawl in 2014. Before the archive can hold their catches side by side, every
# record has to be expressed in the units of one reference gear (`otter_trawl_new`).
#
# This notebook walks the job with calib's Python API on the bundled demo data:
# validate the pooled tables, look at the calibration design, get the conversion factors,
# convert every record, account for what could not be converted, and write the folder and the
# report to send back to the partners.
#
# The data are invented. Real conversion factors hold only for the gears, sizes, habitats and
# seasons of the calibration study; defer to the survey program's standards and to qualified
# review before any management use.

# %%
import os
from pathlib import Path

import pandas as pd

import calib
from calib.convert import convert
from calib.demo import demo_data_dir
from calib.inspect import summarize
from calib.tables import load_tables

OUT = Path(os.environ.get("CALIB_NOTEBOOK_OUT", "notebook_output")) / "data_manager"
OUT.mkdir(parents=True, exist_ok=True)
DATA = demo_data_dir(OUT)  # the bundled demo tables
REFERENCE = "otter_trawl_new"

# %% [markdown]
# ## 1. Validate the pooled tables
#
# `load_tables` reads and checks everything at once. A problem (a negative count, an unknown
# haul, a date that cannot be read) stops here with file, row, column and the fix; nothing
# downstream checks again.

# %%
tables = load_tables(DATA / "hauls.csv", DATA / "catches.csv", DATA / "lengths.csv")
hauls = tables.hauls
print(f"{len(hauls)} hauls, {len(tables.catches)} catch rows, {len(tables.lengths)} length rows")

# %% [markdown]
# Who sampled with what, and when: each `source` is a partner dataset (`gear_trials` holds the
# calibration experiments).

# %%
who = (hauls.groupby(["source", "gear"])
       .agg(hauls=("haul_id", "size"), first_year=("year", "min"), last_year=("year", "max"))
       .reset_index())
who

# %% [markdown]
# ## 2. What the calibration experiments cover
#
# The same summary `calib check` prints: calibration groups per gear combination, each
# species' catch, and warnings.

# %%
summary = summarize(tables, reference=REFERENCE)
pd.DataFrame(summary.combos)[["label", "n_groups", "usable"]]

# %%
print(summary.text(max_per_kind=3))

# %% [markdown]
# ## 3. The conversion factors
#
# Fitting is the slow step. When `CALIB_NOTEBOOK_FACTORS` names a saved factor set (for example
# `demo_output/factors` from `calib demo`, which the test suite passes in), it is loaded;
# otherwise a short fit is run here (few draws: enough to follow the notebook, not for real use,
# where `calib fit`'s defaults apply).

# %%
saved = os.environ.get("CALIB_NOTEBOOK_FACTORS")
if saved:
    factors_dir = Path(saved)
    factor_set = calib.load_factors(factors_dir)
else:
    factor_set = calib.fit(tables, reference=REFERENCE, species_groups=DATA / "species_groups.csv",
                           draws=300, tune=300, progressbar=False)
    factors_dir = factor_set.save(OUT / "factors")
print(factor_set.summary())

# %% [markdown]
# Each factor carries a status. Before converting, look at anything that is not `ok`:

# %%
table = factor_set.table
table.loc[table["status"] != "ok", ["species", "gear", "factor_median", "status", "reason"]]

# %% [markdown]
# ## 4. Convert every record
#
# Every haul × species (zeros included) is expressed in reference-gear units, draw by draw from
# the factors' posterior. Records that cannot be converted are not dropped: they go to
# `rejected` with the reason. Records outside the months or covariate ranges the calibration
# covered are converted but flagged.

# %%
conversion = convert(factor_set, tables)
print(conversion.summary())
assert conversion.n_in == conversion.n_converted + conversion.n_rejected  # nothing silently lost

# %% [markdown]
# Flagged records by partner: which datasets reach beyond what the calibration covered?

# %%
records = conversion.records
flagged = records.assign(flagged=records["domain_flag"].astype(str).str.len() > 0)
flagged.groupby("source", observed=True)["flagged"].agg(["sum", "size"]).rename(
    columns={"sum": "flagged", "size": "records"})

# %% [markdown]
# ## 5. What goes back to the partners
#
# The converted folder (records, rejected.csv, the factor draws used, a manifest with the
# input hashes) and one self-contained HTML report that opens without a network.

# %%
converted_dir = conversion.save(OUT / "converted")
from calib.report import write_report  # noqa: E402

report = write_report(OUT / "report.html", factors_dir, converted=converted_dir)
print(f"converted records: {converted_dir}\nreport: {report}")
sorted(p.name for p in converted_dir.iterdir())
