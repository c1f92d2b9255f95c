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
# # Converting legacy gear records into today's units
#
# *For the analyst.* The channel trawl survey fished a legacy otter trawl until 2014 and the
# tidal creek survey a beach seine until 2013. Their records, with measured lengths, are to be
# expressed in the units of today's gear (`otter_trawl_new`), with the uncertainty of the
# conversion carried along.
#
# **Length.** Gears differ most by size: in the demo scenario the legacy trawl loses small fish
# and the seine favours them. This factor set has one factor per species and gear over all
# sizes, so this notebook converts the legacy records with those species-level factors.
# Length-resolved conversion (a factor per length class, applied to each record's measured
# length composition) needs a length factor set: `calib fit --length-bin 10 --lengths ...`, then
# `calib convert --lengths ...` (user guide, section 2). On the demo data,
# `calib fit --compare --length-bin 10` prefers the length form clearly (docs/user-guide.md), so
# the species-level conversion below treats a legacy size composition as if the gears differed by
# species only: a simplification to keep this notebook quick, not a recommendation.
#
# The data are invented. Factors hold only for the gears, sizes, habitats and seasons of the
# calibration study; defer to the survey program's standards and to qualified review.

# %%
import os
from pathlib import Path

import matplotlib.pyplot as plt
import numpy as np

import calib
from calib.convert import convert
from calib.demo import demo_data_dir
from calib.tables import load_tables

OUT = Path(os.environ.get("CALIB_NOTEBOOK_OUT", "notebook_output")) / "analyst"
OUT.mkdir(parents=True, exist_ok=True)
DATA = demo_data_dir(OUT)
REFERENCE = "otter_trawl_new"

# %% [markdown]
# ## 1. The legacy records
#
# Plain survey hauls (no `pair_id`) taken with the two retired methods, written out as the
# analyst would receive them: a hauls, a catches and a lengths file.

# %%
tables = load_tables(DATA / "hauls.csv", DATA / "catches.csv", DATA / "lengths.csv")
h = tables.hauls
legacy = h[h["pair_id"].isna() & (
    ((h["source"] == "channel_trawl_survey") & (h["gear"] == "otter_trawl_old"))
    | ((h["source"] == "tidal_creek_survey") & (h["gear"] == "beach_seine")))]
keep = legacy["haul_id"]
columns = [c for c in h.columns if c not in ("_row", "year")]
legacy[columns].assign(date=legacy["date"].dt.strftime("%Y-%m-%d")).to_csv(OUT / "legacy_hauls.csv", index=False)
tables.catches[tables.catches["haul_id"].isin(keep)][["haul_id", "species", "count"]].to_csv(
    OUT / "legacy_catches.csv", index=False)
legacy_lengths = tables.lengths[tables.lengths["haul_id"].isin(keep)][["haul_id", "species", "length_mm", "n"]]
legacy_lengths.to_csv(OUT / "legacy_lengths.csv", index=False)
legacy.groupby(["source", "gear"]).agg(hauls=("haul_id", "size"), first=("year", "min"), last=("year", "max"))

# %% [markdown]
# ## 2. The factors, and whether they are resolved by length

# %%
saved = os.environ.get("CALIB_NOTEBOOK_FACTORS")
if saved:
    factor_set = calib.load_factors(saved)
else:  # a short fit, enough to follow the notebook (use `calib fit` defaults for real work)
    factor_set = calib.fit(tables, reference=REFERENCE, species_groups=DATA / "species_groups.csv",
                           draws=300, tune=300, progressbar=False)
by_length = factor_set.table["length_mm"].notna().any()
print("length-resolved factors" if by_length else
      "species-level factors: one factor per species and gear over all sizes "
      "(length-resolved conversion arrives with the length model)")
factor_set.table[factor_set.table["gear"] != REFERENCE][
    ["species", "gear", "factor_median", "factor_lower", "factor_upper", "status"]].head(6)

# %% [markdown]
# Why length matters: in the calibration groups, the mean measured length of each species by
# gear. Where the legacy gear's fish are larger or smaller than the reference gear's, a single
# factor averages over sizes in the proportions the calibration happened to catch.

# %%
cal = h[h["pair_id"].notna()][["haul_id", "gear"]]
measured = tables.lengths.merge(cal, on="haul_id")
mean_length = (measured.assign(total=measured["length_mm"] * measured["n"])
               .groupby(["species", "gear"])[["total", "n"]].sum())
mean_length = (mean_length["total"] / mean_length["n"]).unstack("gear").round(1)
mean_length

# %%
species = "pinfish"
fig, ax = plt.subplots(figsize=(6, 3))
for gear, colour in (("otter_trawl_new", "#1d4f91"), ("otter_trawl_old", "#e08a1e"), ("beach_seine", "#8e3b76")):
    d = measured[(measured["species"] == species) & (measured["gear"] == gear)]
    ax.hist(d["length_mm"], weights=d["n"], bins=np.arange(0, 200, 5), histtype="step", density=True,
            color=colour, linewidth=1.5, label=gear)
ax.set_xlabel("length (mm)")
ax.set_ylabel("share of measured fish")
ax.set_title(f"{species}: lengths measured in the calibration groups")
ax.legend(frameon=False)
plt.show()

# %% [markdown]
# ## 3. Convert the legacy records
#
# Each record's catch per unit effort is multiplied by every posterior draw of its factor; the
# median and interval of those products are its value in reference-gear units.

# %%
conversion = convert(factor_set, OUT / "legacy_hauls.csv", OUT / "legacy_catches.csv")
print(conversion.summary())
assert conversion.n_in == conversion.n_converted + conversion.n_rejected

# %%
records = conversion.records
view = records[records["count"] > 0][["haul_id", "year", "gear", "species", "count", "cpue", "cpue_ref_median",
                                     "cpue_ref_lower", "cpue_ref_upper"]]
view.head(8)

# %% [markdown]
# Per species and legacy gear: mean catch per 1000 m² as recorded and in today's units.

# %%
per = (records.groupby(["species", "gear"], observed=True)[["cpue", "cpue_ref_median"]].mean() * 1000).round(3)
per.rename(columns={"cpue": "as recorded", "cpue_ref_median": "in otter_trawl_new units"}).head(12)

# %% [markdown]
# ## 4. Save the converted legacy records
#
# The folder holds the records (with `domain_flag` for records outside the calibrated months or
# covariate ranges), `rejected.csv` with the reason for any record that could not be converted,
# the factor draws used, and a manifest naming the factor set.

# %%
converted_dir = conversion.save(OUT / "legacy_converted")
sorted(p.name for p in converted_dir.iterdir())
