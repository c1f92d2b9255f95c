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
# # Is the decline real, or the change of gears?
#
# *For the scientist.* Merged records of the (invented) Quillmarsh estuary show species rising
# and falling over 2004–2025. Two partner programs changed gear in 2014–2015. This notebook
# builds the harmonized series (every record in reference-gear units, with sampling and
# conversion uncertainty carried together) and splits each apparent change into the part the
# animals made and the part the change of gears made.
#
# The data are invented; the true trends are in `demo_paired_tows/README.md` (southern flounder
# declines about 5% a year, pink shrimp rises 3% a year, the rest are flat). Trends hold only as
# far as the conversion factors do; defer to the survey program's standards and to qualified
# review before any management use.

# %%
import os
from pathlib import Path

import calib
from calib import plots
from calib.convert import convert
from calib.demo import demo_data_dir
from calib.trend import trend

OUT = Path(os.environ.get("CALIB_NOTEBOOK_OUT", "notebook_output")) / "scientist"
OUT.mkdir(parents=True, exist_ok=True)
DATA = demo_data_dir(OUT)
REFERENCE = "otter_trawl_new"
DRAWS = 200  # paired draws of the series; calib trend uses every factor draw by default

# %% [markdown]
# ## 1. Factors and converted records

# %%
saved = os.environ.get("CALIB_NOTEBOOK_FACTORS")
if saved:
    factor_set = calib.load_factors(saved)
else:  # a short fit, enough to follow the notebook (use `calib fit` defaults for real work)
    factor_set = calib.fit(DATA / "hauls.csv", DATA / "catches.csv", reference=REFERENCE,
                           species_groups=DATA / "species_groups.csv", draws=300, tune=300, progressbar=False)
conversion = convert(factor_set, DATA / "hauls.csv", DATA / "catches.csv", draws=DRAWS, seed=1)
print(conversion.summary())

# %% [markdown]
# ## 2. Where the records come from
#
# The share of hauls by gear each year. The step in 2014–2015 is where an artifact can enter
# a merged series: the same animals, counted by a different net.

# %%
result = trend(conversion, seed=1)
plots.plot_gear_mix(result.gear_mix)

# %% [markdown]
# ## 3. Raw against harmonized
#
# Amber: the merged records as recorded. Blue: the same hauls in reference-gear units. Bands
# are intervals from the paired draws (bootstrap of hauls × posterior draw of the factors).

# %%
plots.plot_series_bands(result.series, species=["southern flounder", "mummichog", "pink shrimp"])

# %% [markdown]
# ## 4. How much of each change is the change of gears?
#
# raw change = harmonized change × artifact (on the ratio scale), draw by draw.

# %%
plots.plot_artifact_bars(result.table)

# %%
result.table[["species", "raw_change_pct", "harmonized_change_pct", "harmonized_change_lower",
              "harmonized_change_upper", "artifact_pct", "verdict"]].round(1)

# %% [markdown]
# ## 5. In plain words
#
# One sentence per species, as `calib trend` writes them to `summary.md`.

# %%
print("\n".join(result.sentences()))

# %% [markdown]
# Compare with the truth the demo was simulated from: the southern flounder really declines
# (its fall was partly hidden by the channel program's 2015 switch to a more efficient trawl),
# and the creek program's 2014 switch from seine to trawl makes silverside, mummichog and grass
# shrimp appear to fall when they do not.

# %%
flounder = result.table.set_index("species").loc["southern flounder"]
print(f"southern flounder: harmonized change {flounder['harmonized_change_pct']:.0f}% "
      f"({flounder['harmonized_change_lower']:.0f}% to {flounder['harmonized_change_upper']:.0f}%), "
      f"verdict: {flounder['verdict']}")
trend_dir = result.save(OUT / "trend")
print(f"written: {trend_dir}")
