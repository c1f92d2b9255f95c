"""Stage 1: read and validate the input tables (hauls, catches, lengths).

This is the only module that checks input. Everything downstream trusts a
:class:`Tables` object. Formats are fixed by docs/data-formats.md (design section 3).

INTERFACE (implemented by the tables work; other stages rely on exactly this):

    read_table(path) -> pandas.DataFrame               # CSV or Parquet by suffix, strings kept as text
    load_tables(hauls, catches, lengths=None) -> Tables  # raises calib.errors.InputError with all problems
    complete_zeros(tables) -> DataFrame                 # one row per haul x species, zeros filled

``Tables`` fields:
    hauls:    DataFrame, one row per haul. Columns: haul_id (str), gear (str),
              date (datetime64[ns]), year (int, derived), effort (float > 0),
              effort_unit (str), pair_id (str or <NA>), and any optional/extra
              columns as given (site, stratum, stratum_area, latitude, longitude, source, ...).
              Index: RangeIndex; column ``_row`` holds the 1-based data row in the file.
    catches:  DataFrame: haul_id (str), species (str), count (float >= 0), ``_row``.
    lengths:  DataFrame or None: haul_id, species, length_mm (float > 0), n (int > 0), ``_row``.
    files:    dict role -> path string as given ("hauls", "catches", "lengths").
    warnings: list[calib.errors.Warning_] found while reading (do not stop the command).
"""
