"""Convert survey records with covariate-dependent factors (factor sets fitted with ``--covariate``).

Called by :func:`calib.convert.convert` for records whose species x gear has only covariate
factors. Each record uses its own haul's covariate values, draw by draw:

    theta_rec[d] = theta_gs[d] + sum_c offset_c[g, level_c(haul)][d] + sum_n slope[g, n][d] * (x_n(haul) - centre_n)
    cpue_ref[d]  = cpue * exp(-theta_rec[d])

(the model of :mod:`calib.covariate_model`; ``centre_n`` is the calibration mean, in the manifest).
Records are grouped by their key (species, gear, levels, numeric values), so the draws are worked
out once per key, not per record.
The draws of every term (theta_gs, each offset, each slope) are kept once per species x gear
(``CovariateConversion.terms``, saved as ``covariate_term_draws.parquet``), from which
:class:`CovariateRecordFactors` rebuilds any record's draws for ``calib series`` and ``calib trend``.

Records are not converted (reasons in rejected.csv) when a covariate is blank or missing in the
survey hauls (``covariate_missing``), when a categorical level was not among the calibrated
levels (``covariate_level``), or when a factors.csv row used has status ``fail`` (``factor_fail``,
unless allow_unconverged). A numeric value outside the range of the calibration groups' values is
converted with the fitted slope (extrapolated) and flagged in domain_flag. A zero catch converts
to zero.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

STATUS_ORDER = {"ok": 0, "warn": 1, "fail": 2}
_CHUNK = 2000  # keys x draws at a time


@dataclass
class CovariateConversion:
    """Result for the candidate records (one entry per record handed in).

    code : (n,) '' converted, else the reject code name.
    quantiles : (n, 3) lower, median, upper of the record's factor (NaN if rejected).
    status : (n,) worst status of the factors.csv rows the record's factor rests on.
    flag : (n,) domain_flag text added ('' none).
    key : (n,) text of the record's covariate values, e.g. "day_night=night; depth_m=4.5".
    draws : species, gear, covariates (key text), draw, factor, posterior_chain, posterior_draw:
        the draws used, once per key, for keys of categorical covariates only (a numeric value
        makes every record its own key; its draws follow from posterior.nc and the value).
    use : species, gear, covariates, factor_status, factor_lower, factor_median, factor_upper,
        n_records (per key of the converted records).
    terms : species, gear, term, covariate, level, draw, value (posterior_chain, posterior_draw: the
        posterior sample of each draw): the draws of every term of theta_rec
        (module docstring) for each species x gear converted this way -- ``theta`` (covariate and
        level blank), ``offset`` (one per categorical covariate and level) and ``slope`` (one per
        numeric covariate; its centre is in the manifest) -- from which any record's draws follow
        (:class:`CovariateRecordFactors`).
    """

    code: np.ndarray
    quantiles: np.ndarray
    status: np.ndarray
    flag: np.ndarray
    key: np.ndarray
    draws: pd.DataFrame
    use: pd.DataFrame
    terms: pd.DataFrame | None = None


TERM_COLUMNS = ["species", "gear", "term", "covariate", "level", "draw", "value", "posterior_chain", "posterior_draw"]


def convert_by_covariate(fs, hauls: pd.DataFrame, hp: np.ndarray, sc: np.ndarray, species_all: list[str],
                         count: np.ndarray, idx: np.ndarray, probs, *, allow_unconverged: bool = False
                         ) -> CovariateConversion:
    """Convert records (haul position ``hp`` into ``hauls``, species code ``sc``, ``count``) with the
    covariate factors of ``fs``; ``idx`` are the posterior draws used (flat chain x draw index)."""
    from calib.covariate_model import _safe

    info = fs.manifest["covariates"]
    cat = [c for c, v in info.items() if v["kind"] == "categorical"]
    num = [c for c, v in info.items() if v["kind"] == "numeric"]
    n = len(hp)
    code = np.full(n, "", dtype=object)
    q = np.full((n, 3), np.nan)
    status = np.full(n, "", dtype=object)
    flag = np.full(n, "", dtype=object)
    post = fs.idata.posterior
    n_chain, n_draw = post.sizes["chain"], post.sizes["draw"]

    def flat(da, *dims):
        return da.transpose("chain", "draw", *dims).values.reshape(n_chain * n_draw, *[da.sizes[d] for d in dims])

    # per record: level index per categorical covariate (-1 blank, -2 not calibrated), numeric value
    lev = np.zeros((n, len(cat)), dtype=np.int64)
    val = np.zeros((n, len(num)))
    missing = np.zeros(n, dtype=bool)
    for k, c in enumerate(cat):
        if c not in hauls.columns:
            missing[:] = True
            continue
        col = hauls[c].astype("string").str.strip()
        blank = (col.isna() | (col == "")).fillna(True).to_numpy(dtype=bool)[hp]
        text = col.fillna("").to_numpy(dtype=object)[hp]
        levels = list(info[c]["levels"])
        pos = {lv: i for i, lv in enumerate(levels)}
        lev[:, k] = [-1 if b else pos.get(str(t), -2) for t, b in zip(text, blank)]
        missing |= lev[:, k] == -1
        code[(lev[:, k] == -2) & (code == "")] = "covariate_level"
    for k, c in enumerate(num):
        if c not in hauls.columns or not pd.api.types.is_numeric_dtype(hauls[c]):
            missing[:] = True
            continue
        v = hauls[c].to_numpy(dtype=float)[hp]
        val[:, k] = v
        missing |= ~np.isfinite(v)
        lo, hi = info[c]["calibrated_range"]
        for mask, word in ((v < lo, "below"), (v > hi, "above")):
            text = f"{c} {word} the calibrated range of group means ({lo:g} to {hi:g}): factor extrapolated"
            flag[mask] = np.where(flag[mask] == "", text, flag[mask] + "; " + text)
    code[missing] = "covariate_missing"

    table = fs.table
    status_of = {(s, g, c, str(lv)): str(st) for s, g, c, lv, st in
                 zip(table["species"], table["gear"], table["covariate"], table["level"], table["status"])}
    gear_h = hauls["gear"].to_numpy(dtype=object)[hp]
    spec_h = np.asarray(species_all, dtype=object)[sc]
    key_text = np.full(n, "", dtype=object)
    draw_frames, use_rows, term_frames = [], [], []
    rec = pd.DataFrame({"species": spec_h, "gear": gear_h, "rec": np.arange(n)})
    for (s, g), part in rec.groupby(["species", "gear"], sort=True):
        rows = part["rec"].to_numpy()
        rows = rows[code[rows] == ""]
        if not len(rows):
            continue
        base = flat(post["theta"].sel(gear=g, species=s))[idx]  # (D,)
        offs = [flat(post[f"offset_{_safe(c)}"].sel(gear=g), f"level_{_safe(c)}")[idx] for c in cat]  # (D, L)
        slopes = flat(post["slope"].sel(gear=g), "numeric")[idx] if num else None  # (D, N)
        centre = np.array([info[c]["centre"] for c in num])
        D = len(idx)
        sample = {"posterior_chain": idx // n_draw, "posterior_draw": idx % n_draw}
        term_frames.append(pd.DataFrame({"species": s, "gear": g, "term": "theta", "covariate": "", "level": "",
                                         "draw": np.arange(D), "value": base, **sample}))
        for k, c in enumerate(cat):
            for li, lv in enumerate(info[c]["levels"]):
                term_frames.append(pd.DataFrame({"species": s, "gear": g, "term": "offset", "covariate": c,
                                                 "level": str(lv), "draw": np.arange(D), "value": offs[k][:, li],
                                                 **sample}))
        for k, c in enumerate(num):
            term_frames.append(pd.DataFrame({"species": s, "gear": g, "term": "slope", "covariate": c, "level": "",
                                             "draw": np.arange(D), "value": slopes[:, k], **sample}))
        # one key per distinct (levels, values)
        keys = np.column_stack([lev[rows].astype(float), val[rows]]) if (cat or num) else np.zeros((len(rows), 0))
        ukeys, kinv = np.unique(keys, axis=0, return_inverse=True)
        kinv = kinv.reshape(-1)
        worst = np.zeros(len(ukeys), dtype=int)
        texts = []
        for u, kv in enumerate(ukeys):
            parts, w = [], 0
            for k, c in enumerate(cat):
                lv = info[c]["levels"][int(kv[k])]
                parts.append(f"{c}={lv}")
                w = max(w, STATUS_ORDER.get(status_of.get((s, g, c, lv), "fail"), 2))
            for k, c in enumerate(num):
                parts.append(f"{c}={kv[len(cat) + k]:g}")
                sts = [STATUS_ORDER.get(st, 2) for (s2, g2, c2, _), st in status_of.items()
                       if (s2, g2, c2) == (s, g, c)]
                w = max(w, max(sts) if sts else 2)
            worst[u] = w
            texts.append("; ".join(parts))
        inv_rank = {v: k for k, v in STATUS_ORDER.items()}
        key_text[rows] = np.asarray(texts, dtype=object)[kinv]
        status[rows] = np.asarray([inv_rank[w] for w in worst], dtype=object)[kinv]
        if not allow_unconverged:
            failed = worst[kinv] == 2
            code[rows[failed]] = "factor_fail"
        ukq = np.full((len(ukeys), 3), np.nan)
        for start in range(0, len(ukeys), _CHUNK):
            ch = slice(start, start + _CHUNK)
            th = np.broadcast_to(base[None, :], (len(ukeys[ch]), len(base))).copy()  # (U, D)
            for k in range(len(cat)):
                th += offs[k][:, ukeys[ch, k].astype(int)].T
            if num:
                th += (ukeys[ch, len(cat):] - centre[None, :]) @ slopes.T
            f = np.exp(-th)
            ukq[ch] = np.quantile(f, probs, axis=1).T
            if not num:
                for u in range(start, min(start + _CHUNK, len(ukeys))):
                    draw_frames.append(pd.DataFrame({
                        "species": s, "gear": g, "covariates": texts[u], "draw": np.arange(len(idx)),
                        "factor": f[u - start], "posterior_chain": idx // n_draw, "posterior_draw": idx % n_draw}))
        q[rows] = ukq[kinv]
        zero = count[rows] == 0
        q[rows[zero]] = 0.0  # a zero catch converts to zero whatever the factor
        ok = code[rows] == ""
        n_use = np.bincount(kinv[ok], minlength=len(ukeys))
        for u in np.flatnonzero(n_use):
            use_rows.append({"species": s, "gear": g, "covariates": texts[u], "factor_status": inv_rank[worst[u]],
                             "factor_lower": ukq[u, 0], "factor_median": ukq[u, 1], "factor_upper": ukq[u, 2],
                             "n_records": int(n_use[u])})
    q[code != ""] = np.nan
    draws = pd.concat(draw_frames, ignore_index=True) if draw_frames else pd.DataFrame(
        columns=["species", "gear", "covariates", "draw", "factor", "posterior_chain", "posterior_draw"])
    use = pd.DataFrame(use_rows, columns=["species", "gear", "covariates", "factor_status", "factor_lower",
                                          "factor_median", "factor_upper", "n_records"])
    terms = pd.concat(term_frames, ignore_index=True) if term_frames else pd.DataFrame(columns=TERM_COLUMNS)
    return CovariateConversion(code=code, quantiles=q, status=status, flag=flag, key=key_text, draws=draws, use=use,
                               terms=terms[TERM_COLUMNS])


def covariate_reason(name: str, s: str, g: str, info: dict, factor_id: str) -> str:
    """Reason text of a record rejected for its covariates (rejected.csv)."""
    cat = {c: v["levels"] for c, v in info.items() if v["kind"] == "categorical"}
    listed = "; ".join(f"{c}: {', '.join(v)}" for c, v in cat.items())
    if name == "covariate_level":
        return (f"the factors for '{s}' with '{g}' (factor set {factor_id}) depend on covariates and this haul's "
                f"level was not calibrated (calibrated levels: {listed}): calibrate at that level, or record the "
                "haul under a calibrated level if it truly is one")
    return (f"the factors for '{s}' with '{g}' (factor set {factor_id}) depend on the covariates "
            f"{', '.join(info)}, which are blank or missing for this haul: add the column(s) to the survey hauls "
            "and fill them in")


class CovariateRecordFactors:
    """Rebuilds, draw by draw, the factor of records converted with their own covariate values,
    from what ``calib convert`` saved: the term draws (``covariate_term_draws``; see
    :class:`CovariateConversion`) and the manifest's ``covariates`` entry (kinds, levels, centres).
    For a record of species s and gear g with levels v_c and numeric values x_n,

        m[d] = exp(-(theta_gs[d] + sum_c offset_c[g, v_c][d] + sum_n slope[g, n][d] (x_n - centre_n)))

    the formula convert used (module docstring), so the record's median and interval over the
    draws are its cpue_ref_median / lower / upper divided by its cpue. Draw d of every term is
    the same posterior sample. Used by :func:`calib.series.series_draws`.
    """

    kind = "covariate"

    def __init__(self, terms: pd.DataFrame, covariates: dict, where: str = "covariate_term_draws"):
        from calib.errors import InputError, Problem

        need = [c for c in TERM_COLUMNS[:7] if c not in terms.columns]
        if need or not covariates:
            raise InputError([Problem(where, None, c, "column missing", "convert again", False) for c in need]
                             or [Problem(where, None, None, "the conversion manifest has no 'covariates' entry",
                                         "convert again", False)])
        t = pd.DataFrame({c: terms[c].astype(str).fillna("") if c not in ("draw", "value") else terms[c]
                          for c in TERM_COLUMNS[:7]})
        t["level"] = t["level"].replace("nan", "")
        t["covariate"] = t["covariate"].replace("nan", "")
        wide = t.pivot_table(index=["species", "gear", "term", "covariate", "level"], columns="draw",
                             values="value", aggfunc="first", observed=True)
        if wide.isna().any().any() or not np.isfinite(wide.to_numpy()).all():
            raise InputError([Problem(where, None, "draw", "the covariate terms do not all have the same finite draws",
                                      "convert again: every term is stored with the same draws", False)])
        self.where = where
        self.info = covariates
        self.cat = [c for c, v in covariates.items() if v["kind"] == "categorical"]
        self.num = [c for c, v in covariates.items() if v["kind"] == "numeric"]
        self.columns = tuple(self.cat + self.num)
        self.rows = wide.index
        self.matrix = wide.to_numpy(dtype=float)
        self.draw = wide.columns.to_numpy()
        base = wide.index.get_level_values("term") == "theta"
        self.keys = sorted(zip(wide.index.get_level_values(0)[base], wide.index.get_level_values(1)[base]))
        from calib.length_convert import _posterior_of

        self.posterior = _posterior_of(terms)

    def bind(self, records: pd.DataFrame, rows: np.ndarray, pick: np.ndarray, gear_column: str = "gear"):
        """For records ``rows`` of ``records`` (species, gear and the covariate columns): a function
        giving the (len(idx), draws ``pick``) multiplier matrix of bound records ``idx``, and whether
        each bound record has all its covariate values (convert rejects those that do not)."""
        from calib.errors import InputError, Problem

        missing = [c for c in self.columns if c not in records.columns]
        if missing:
            raise InputError([Problem(self.where, None, c, "covariate column missing from the converted records",
                                      "convert again: records keep every hauls column", False) for c in missing])
        n = len(rows)

        def column(name):  # codes of the bound rows into a few labels (no per-record text)
            codes, labels = pd.factorize(records[name].iloc[rows] if len(rows) < len(records) else records[name])
            return codes, np.asarray([str(v).strip() for v in labels], dtype=object)

        sp, ge = column("species"), column(gear_column)

        def lookup(term, cov, level=None):
            """Row of the term for each bound record (-1: none), looked up once per distinct key."""
            parts = [sp, ge] + ([level] if level is not None else [])
            radix = [len(lab) + 1 for _, lab in parts]
            key = np.zeros(n, dtype=np.int64)
            for (c, _), r in zip(parts, radix):  # one integer per combination (-1 -> 0: blank)
                key *= r
                key += c + 1
            inv, ukey = pd.factorize(key)  # hash-based: no sort of the records
            keys = np.zeros((len(ukey), len(parts)), dtype=np.int64)
            rest = np.asarray(ukey, dtype=np.int64)
            for k in range(len(parts) - 1, -1, -1):
                keys[:, k] = rest % radix[k] - 1
                rest = rest // radix[k]
            labels = [lab[np.maximum(keys[:, k], 0)] for k, (_, lab) in enumerate(parts)]
            lv = labels[2] if level is not None else np.full(len(keys), "", dtype=object)
            found = self.rows.get_indexer(pd.MultiIndex.from_arrays(
                [labels[0], labels[1], np.full(len(keys), term), np.full(len(keys), cov), lv]))
            found[(keys < 0).any(axis=1)] = -1  # a blank value
            return found[inv] if n else np.zeros(0, dtype=np.int64)

        has = np.ones(n, dtype=bool)
        base = lookup("theta", "")
        has &= base >= 0
        offsets = []
        for c in self.cat:
            r = lookup("offset", c, column(c))
            has &= r >= 0
            offsets.append(r)
        slopes = []
        for c in self.num:
            x = pd.to_numeric(records[c], errors="coerce").to_numpy(dtype=float)[rows] - float(self.info[c]["centre"])
            r = lookup("slope", c)
            has &= (r >= 0) & np.isfinite(x)
            slopes.append((r, np.where(np.isfinite(x), x, 0.0)))
        M = np.ascontiguousarray(self.matrix[:, pick])

        def multipliers(idx: np.ndarray) -> np.ndarray:
            ok = has[idx]
            th = M[np.where(ok, base[idx], 0)]
            for r in offsets:
                th += M[np.maximum(r[idx], 0)]
            for r, x in slopes:
                th += M[np.maximum(r[idx], 0)] * x[idx, None]
            np.negative(th, out=th)
            np.exp(th, out=th)
            th[~ok] = 0.0
            return th

        return multipliers, has


__all__ = ["convert_by_covariate", "covariate_reason", "CovariateConversion", "CovariateRecordFactors"]
