"""Convert survey records with length-dependent factors (``calib convert --lengths``).

Called by :func:`calib.convert.convert` for records whose species x gear has only length-class
factors (a factor set fitted with ``--length-bin``). For one haul x species with count C, measured
fish n_l in the factor set's length class l (classes [k * bin, (k + 1) * bin), the fit's) and
measured fraction f = sum_l n_l / C,

    C_l          = n_l / f                               (the class count raised to the whole catch)
    cpue_ref[d]  = sum_l C_l * factor_l[d] / effort       for every posterior draw d
                 = cpue * sum_l (n_l / sum n) * factor_l[d]

so the record's effective factor is the length-composition-weighted mean of its classes' factor
draws, draw by draw (the classes' draws come from the same posterior samples). Class factor draws
are stored once per species x gear x class (``length_factor_draws``), and each record's raised
class counts once per record and class (``record_lengths``), from which any draw of any record
can be rebuilt; records x draws is never stored.

Records are not converted (reasons in rejected.csv) when: the catch is > 0 but the haul x species
has no lengths (``no_lengths``); fish lie outside the species' calibrated length range
(``outside_length_range``; with ``outside="nearest"`` they are converted with the nearest class
and flagged in domain_flag instead); a class used has status ``fail`` (``factor_fail``, unless
allow_unconverged). A zero catch converts to zero.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

OUTSIDE = ("reject", "nearest")
STATUS_ORDER = {"ok": 0, "warn": 1, "fail": 2}


@dataclass
class LengthConversion:
    """Result for the candidate records (one entry per record handed in).

    code : (n,) 0 converted, else the reject code name ('' when converted).
    quantiles : (n, 3) lower, median, upper of the record's effective factor (NaN if rejected).
    status : (n,) worst status of the classes used ('ok' / 'warn' / 'fail'; '' if rejected).
    flag : (n,) domain_flag text added ('' none).
    draws : long table species, gear, length_mm, draw, factor, posterior_chain, posterior_draw
        (the class draws used, once per class).
    record_lengths : haul_id, species, length_mm (fit class lower bound), measured, raised_count,
        factor_length_mm (the class whose factor was used: differs with outside="nearest").
    class_use : species, gear, length_mm, n_records (converted records using the class).
    """

    code: np.ndarray
    quantiles: np.ndarray
    status: np.ndarray
    flag: np.ndarray
    draws: pd.DataFrame
    record_lengths: pd.DataFrame
    class_use: pd.DataFrame


def survey_length_problems(lengths: pd.DataFrame, bin_mm: float, where: str) -> list:
    """Problems when survey lengths are recorded in classes coarser than (or straddling) the
    factor set's classes: such a fish cannot be given one class factor."""
    from calib.cells import check_length_bin

    return check_length_bin(lengths, bin_mm, where)[1]


def convert_by_length(fs, tables, hauls: pd.DataFrame, hp: np.ndarray, sc: np.ndarray, species_all: list[str],
                      count: np.ndarray, idx: np.ndarray, probs, *, allow_unconverged: bool = False,
                      outside: str = "reject") -> LengthConversion:
    """Convert records (haul position ``hp`` into ``hauls``, species code ``sc``, ``count``) with the
    length-class factors of ``fs``; ``idx`` are the posterior draws used (flat chain x draw index)."""
    from calib.cells import length_class_of

    if outside not in OUTSIDE:
        raise ValueError(f"outside must be one of {OUTSIDE}, not {outside!r}")
    n = len(hp)
    info = fs.manifest["lengths"]
    bin_mm = float(info["bin_mm"])
    classes_of = {s: np.asarray(v, dtype=float) for s, v in info["classes_mm"].items()}
    theta = fs.idata.posterior["theta"].transpose("chain", "draw", "gear", "species", "length")
    n_chain, n_draw = theta.sizes["chain"], theta.sizes["draw"]
    t_len = np.asarray(theta.coords["length"].values, dtype=float)
    t_gear = {str(g): i for i, g in enumerate(theta.coords["gear"].values)}
    t_sp = {str(s): i for i, s in enumerate(theta.coords["species"].values)}
    table = fs.table[fs.table["length_mm"].notna()]
    status_of = {(s, g, float(L)): (str(st), "" if pd.isna(r) else str(r))
                 for s, g, L, st, r in zip(table["species"], table["gear"], table["length_mm"], table["status"],
                                           table["reason"])}

    code = np.full(n, "", dtype=object)
    q = np.full((n, 3), np.nan)
    status = np.full(n, "", dtype=object)
    flag = np.full(n, "", dtype=object)
    draw_frames, rl_frames, use_rows = [], [], []

    hid = hauls["haul_id"].to_numpy(dtype=object)
    gear_h = hauls["gear"].to_numpy(dtype=object)
    # measured fish of the candidate records, by fit class
    rec = pd.DataFrame({"haul_id": hid[hp], "species": np.asarray(species_all, dtype=object)[sc], "rec": np.arange(n)})
    ln = tables.lengths
    if ln is not None and len(ln):
        m = ln[["haul_id", "species", "length_mm", "n"]].merge(rec, on=["haul_id", "species"], how="inner")
    else:
        m = pd.DataFrame({"haul_id": [], "species": [], "length_mm": [], "n": [], "rec": []})
    m["lower"] = length_class_of(m["length_mm"].to_numpy(dtype=float), bin_mm)
    m = m.groupby(["rec", "lower"], as_index=False)["n"].sum()
    measured = np.bincount(m["rec"].to_numpy(dtype=np.int64), weights=m["n"].to_numpy(dtype=float), minlength=n)

    rec_gear = gear_h[hp]
    code[(count > 0) & (measured == 0)] = "no_lengths"

    for (s, g), part in rec.assign(gear=rec_gear).groupby(["species", "gear"], sort=True):
        rows = part["rec"].to_numpy()
        classes = classes_of.get(s)
        if classes is None or g not in t_gear or s not in t_sp:
            code[rows] = np.where(code[rows] == "", "no_draws", code[rows])
            continue
        cls_pos = np.searchsorted(t_len, classes)
        th = theta.values[:, :, t_gear[g], t_sp[s], :][:, :, cls_pos].reshape(n_chain * n_draw, len(classes))
        f_cls = np.exp(-th[idx])  # (D, L)
        st_cls = [status_of.get((s, g, float(L)), ("ok", ""))[0] for L in classes]
        lo, hi = classes[0], classes[-1] + bin_mm
        mm = m[m["rec"].isin(rows)]
        mrec = mm["rec"].to_numpy(dtype=np.int64)
        lower = mm["lower"].to_numpy(dtype=float)
        pos = np.rint((lower - classes[0]) / bin_mm).astype(np.int64)
        inside = (pos >= 0) & (pos < len(classes))
        near = np.clip(pos, 0, len(classes) - 1)
        out_rec = np.unique(mrec[~inside])
        if outside == "reject":
            code[out_rec] = np.where(code[out_rec] == "", "outside_length_range", code[out_rec])
        else:
            n_out = np.bincount(mrec[~inside], weights=mm["n"].to_numpy(dtype=float)[~inside], minlength=n)
            for r in out_rec:
                flag[r] = (f"{n_out[r]:g} measured fish outside the calibrated lengths ({lo:g}-{hi:g} mm) "
                           "converted with the nearest class's factor")
        # composition matrix of the records (rows) over classes
        local = {r: k for k, r in enumerate(rows)}
        comp = np.zeros((len(rows), len(classes)))
        li = np.array([local[r] for r in mrec], dtype=np.int64)
        np.add.at(comp, (li, near), mm["n"].to_numpy(dtype=float))
        tot = comp.sum(axis=1)
        used_cls = comp > 0
        worst = np.zeros(len(rows), dtype=int)
        st_rank = np.array([STATUS_ORDER.get(x, 2) for x in st_cls])
        for k in range(len(rows)):
            if used_cls[k].any():
                worst[k] = st_rank[used_cls[k]].max()
            else:
                worst[k] = st_rank.max()  # a zero catch: the worst class of the species x gear
        inv_rank = {v: k for k, v in STATUS_ORDER.items()}
        for k, r in enumerate(rows):
            status[r] = inv_rank[worst[k]]
            if code[r] == "" and worst[k] == 2 and not allow_unconverged:
                code[r] = "factor_fail"
        ok_local = np.array([code[r] == "" for r in rows], dtype=bool)
        share = np.divide(comp, tot[:, None], out=np.zeros_like(comp), where=tot[:, None] > 0)
        sel = np.flatnonzero(ok_local & (tot > 0))
        for start in range(0, len(sel), 2000):  # bounded memory: 2000 records x draws at a time
            ch = sel[start:start + 2000]
            eff = share[ch] @ f_cls.T  # (records, D)
            q[rows[ch]] = np.quantile(eff, probs, axis=1).T
        zsel = np.flatnonzero(ok_local & (tot == 0))
        q[rows[zsel]] = 0.0  # a zero catch converts to zero whatever the factor
        # what was used, once per class
        ok_rows = rows[ok_local]
        n_use = (used_cls[ok_local]).sum(axis=0)
        for L, k_use in zip(classes, n_use):
            use_rows.append((s, g, float(L), int(k_use)))
        if ok_local.any():
            D = len(idx)
            draw_frames.append(pd.DataFrame({
                "species": s, "gear": g, "length_mm": np.repeat(classes, D), "draw": np.tile(np.arange(D), len(classes)),
                "factor": f_cls.T.reshape(-1), "posterior_chain": np.tile(idx // n_draw, len(classes)),
                "posterior_draw": np.tile(idx % n_draw, len(classes))}))
        keep = np.isin(mrec, ok_rows)
        if keep.any():
            f_rec = measured[mrec[keep]] / np.where(count[mrec[keep]] > 0, count[mrec[keep]], 1.0)
            rl_frames.append(pd.DataFrame({
                "haul_id": hid[hp[mrec[keep]]], "species": s, "length_mm": lower[keep],
                "measured": mm["n"].to_numpy(dtype=float)[keep],
                "raised_count": mm["n"].to_numpy(dtype=float)[keep] / f_rec,
                "factor_length_mm": classes[near[keep]]}))
    draws = pd.concat(draw_frames, ignore_index=True) if draw_frames else pd.DataFrame(
        columns=["species", "gear", "length_mm", "draw", "factor", "posterior_chain", "posterior_draw"])
    record_lengths = pd.concat(rl_frames, ignore_index=True) if rl_frames else pd.DataFrame(
        columns=["haul_id", "species", "length_mm", "measured", "raised_count", "factor_length_mm"])
    class_use = pd.DataFrame(use_rows, columns=["species", "gear", "length_mm", "n_records"])
    return LengthConversion(code=code, quantiles=q, status=status, flag=flag, draws=draws,
                            record_lengths=record_lengths, class_use=class_use)


# ----------------------------------------------------------------------------- rebuilding draws


class LengthRecordFactors:
    """Rebuilds, draw by draw, the effective factor of records converted by length class, from
    what ``calib convert`` saved: the class draws (``length_factor_draws``: species, gear,
    length_mm, draw, factor) and the raised class counts (``record_lengths``: haul_id, species,
    factor_length_mm, raised_count). For record i of species s and gear g, with raised counts C_l,

        m_i[d] = sum_l C_l factor_{s,g,l}[d] / sum_l C_l

    (module docstring: cpue_ref[d] = cpue * m_i[d]), the same mix convert summarised in
    cpue_ref_median / lower / upper. Draw d of every class is the same posterior sample, so
    records sharing a class share its draws. Used by :func:`calib.series.series_draws`.
    """

    columns = ("haul_id",)  # record columns needed besides species and gear
    kind = "length"

    def __init__(self, class_draws: pd.DataFrame, record_lengths: pd.DataFrame, where: str = "length_factor_draws",
                 lengths_where: str = "record_lengths.csv"):
        from calib.errors import InputError, Problem

        need = [c for c in ("species", "gear", "length_mm", "draw", "factor") if c not in class_draws.columns]
        need_rl = [c for c in ("haul_id", "species", "factor_length_mm", "raised_count")
                   if c not in record_lengths.columns]
        if need or need_rl:
            raise InputError([Problem(w, None, c, "column missing", "convert again with --lengths", False)
                              for w, cols in ((where, need), (lengths_where, need_rl)) for c in cols])
        d = class_draws.assign(species=class_draws["species"].astype(str), gear=class_draws["gear"].astype(str),
                               length_mm=class_draws["length_mm"].astype(float))
        wide = d.pivot_table(index=["species", "gear", "length_mm"], columns="draw", values="factor",
                             aggfunc="first", observed=True)
        if wide.isna().any().any() or not np.isfinite(wide.to_numpy()).all():
            raise InputError([Problem(where, None, "draw", "the length classes do not all have the same finite draws",
                                      "convert again: every class is stored with the same draws", False)])
        self.where, self.lengths_where = where, lengths_where
        self.classes = wide.index  # (species, gear, length_mm)
        self.matrix = wide.to_numpy(dtype=float)  # (classes, draws)
        self.draw = wide.columns.to_numpy()
        self.keys = sorted(set(zip(self.classes.get_level_values(0), self.classes.get_level_values(1))))
        self.posterior = _posterior_of(d)
        self.record_lengths = record_lengths

    def bind(self, records: pd.DataFrame, rows: np.ndarray, pick: np.ndarray, gear_column: str = "gear"):
        """For records ``rows`` of ``records`` (species, gear, haul_id): a function giving the
        (len(idx), draws ``pick``) multiplier matrix of bound records ``idx`` (0..len(rows)-1),
        and whether each bound record has lengths (a zero catch has none: its multiplier is 0)."""
        from scipy.sparse import csr_matrix

        from calib.errors import InputError, Problem

        def codes_of(col):  # codes of the bound records into their distinct values, as text
            v = records[col] if len(rows) == len(records) else records[col].iloc[rows]
            c, labels = pd.factorize(v)
            return c.astype(np.int64), pd.Index([str(x) for x in labels])

        hc, h_labels = codes_of("haul_id")
        sc, s_labels = codes_of("species")
        gc, g_labels = codes_of(gear_column)
        # each record_lengths row -> its bound record, through integer codes (no record-sized text)
        rl = self.record_lengths
        rh = h_labels.get_indexer(rl["haul_id"].astype(str))
        rs = s_labels.get_indexer(rl["species"].astype(str))
        key_rec = pd.Index(hc * len(s_labels) + sc)
        pos = np.where((rh >= 0) & (rs >= 0), key_rec.get_indexer(rh * len(s_labels) + rs), -1)
        keep = pos >= 0
        pos = pos[keep]
        length = rl["factor_length_mm"].to_numpy(dtype=float)[keep]
        w = rl["raised_count"].to_numpy(dtype=float)[keep]
        # class of each row: looked up once per distinct (species, gear, length)
        combo = pd.MultiIndex.from_arrays([sc[pos], gc[pos], length])
        uc = combo.unique()
        inv = uc.get_indexer(combo)
        ucls = self.classes.get_indexer(pd.MultiIndex.from_arrays(
            [s_labels[uc.get_level_values(0)], g_labels[uc.get_level_values(1)], uc.get_level_values(2)]))
        cls = ucls[inv]
        if (cls < 0).any():
            i = int(np.flatnonzero(cls < 0)[0])
            raise InputError([Problem(self.lengths_where, None, "factor_length_mm",
                                      f"haul '{h_labels[hc[pos[i]]]}', {s_labels[sc[pos[i]]]} with "
                                      f"{g_labels[gc[pos[i]]]}: no class draws for {length[i]:g} mm in {self.where}",
                                      "use record_lengths.csv and length_factor_draws.parquet of one conversion",
                                      False)])
        W = csr_matrix((w, (pos, cls)), shape=(len(rows), len(self.classes)))  # duplicates are summed
        total = np.asarray(W.sum(axis=1)).ravel()
        has = total > 0
        W = csr_matrix(W.multiply(1.0 / np.where(has, total, 1.0)[:, None]))
        F = np.ascontiguousarray(self.matrix[:, pick])

        def multipliers(idx: np.ndarray) -> np.ndarray:
            return np.asarray(W[idx] @ F)

        return multipliers, has


def _posterior_of(d: pd.DataFrame) -> pd.DataFrame | None:
    """draw -> (posterior_chain, posterior_draw), to check two draw tables share posterior samples."""
    if not {"posterior_chain", "posterior_draw"} <= set(d.columns) or not len(d):
        return None
    return d.groupby("draw")[["posterior_chain", "posterior_draw"]].first()
