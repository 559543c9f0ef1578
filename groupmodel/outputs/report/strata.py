"""What the report adds for a model with within-participant factors (``design.json`` ``strata``): the
observations (images per participant, participants per within cell), the error stratum each hypothesis is
tested in, the sensitivity in that stratum, and the sphericity epsilons of F tests with more than one within df.

Everything is read from the folder's files: ``design.json`` (``strata``), ``participants_included.tsv`` (one
row per image), ``stratum-<s>_design.tsv`` and the maps through the index.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from .data import FolderData
from .page import esc, num, paragraph, table
from .sensitivity import sensitivity


def strata_of(d: FolderData) -> dict[str, Any] | None:
    """``design.json`` ``strata`` (None without within-participant factors)."""
    return d.design.get("strata")


def stratum_tests(d: FolderData) -> dict[str, dict[str, Any]]:
    """Hypothesis -> how it is tested in its stratum (``design.json`` ``strata.hypotheses``)."""
    s = strata_of(d)
    return {} if s is None else s.get("hypotheses", {})


# ----- the observations ------------------------------------------------------------------------------------
def observations_html(d: FolderData) -> str:
    """Images per participant and participants per within cell."""
    s = strata_of(d)
    assert s is not None
    within = list(s.get("within_factors", []))
    parts = ["<h3>Observations</h3>",
             paragraph(f"{len(d.design_frame)} images of {s.get('participants')} participants; within-participant "
                       f"factors: {', '.join(within)} ({len(s.get('within_cells', []))} within cells: "
                       f"{'; '.join(s.get('within_cells', []))}).")]
    inc = d.included
    if inc is None or not set(within) <= set(inc.columns):
        return "".join(parts) + paragraph("Per-cell counts need participants_included.tsv.", "note")
    ids = inc["participant_id"].astype(str)
    per = ids.value_counts()
    counts = per.value_counts().sort_index()
    parts.append(table(["images per participant", "participants"],
                       [(int(k), int(v)) for k, v in counts.items()], ident="images-per-participant"))
    cells = inc.assign(_cell=inc[within].astype(str).agg(", ".join, axis=1))
    by_cell = cells.groupby("_cell", sort=False)["participant_id"].nunique()
    labels = [", ".join(f"{f}={v}" for f, v in zip(within, key.split(", "), strict=False))
              for key in by_cell.index]
    parts.append(table(["within cell", "participants with an image"],
                       [(lab, int(v)) for lab, v in zip(labels, by_cell, strict=True)], ident="within-cells"))
    full = len(s.get("within_cells", []))
    short = sorted(per[per < full].index.tolist())
    if short:
        parts.append(paragraph(f"Without an image in every within cell ({len(short)}): {', '.join(short)}; "
                               "each is left out of the hypotheses that need a missing cell (listed below).",
                               "finding-warning"))
    return "".join(parts)


# ----- the strata --------------------------------------------------------------------------------------
def strata_html(d: FolderData) -> str:
    """One row per hypothesis: stratum, data tested, participants entered and who was left out."""
    rows = []
    for name, t in stratum_tests(d).items():
        left = "; ".join(f"{x['participant_id']} ({x['reason']})" for x in t.get("left_out", [])) or "none"
        rows.append((name, t["stratum"], t.get("transformed_data", ""), t.get("participants"), left))
    s = strata_of(d) or {}
    return ("<h3>Error strata</h3>"
            + paragraph("With several images per participant the design above (one row per image) is not fitted "
                        "as one model: each hypothesis is tested in its error stratum, on each participant's "
                        "transformed images fitted with the between-participant design. " + str(s.get("model", "")))
            + table(["hypothesis", "stratum", "tested on", "participants", "left out"], rows, ident="strata"))


def stratum_cell(h: dict[str, Any]) -> str:
    """The hypotheses table's stratum cell: the stratum and what it is tested on (HTML)."""
    if not h.get("stratum"):
        return ""
    return f"{esc(h['stratum'])}<br><span class=\"note\">{esc(h.get('tested_on', ''))}</span>"


def stratum_sensitivity(d: FolderData, name: str, h: dict[str, Any], alpha: float) -> Any:
    """The sensitivity of a hypothesis in its stratum, in units of the stratum's residual SD (None when the
    stratum's design file is missing): the stacked model kron(X, I_c), kron(L, I_c) of the split-plot F."""
    t = stratum_tests(d).get(name)
    if t is None:
        return None
    path = d.locations.top(f"stratum-{t['stratum']}_design.tsv")
    if path is None:
        return None
    frame = pd.read_csv(path, sep="\t", dtype={"participant_id": str})
    gone = {x["participant_id"] for x in t.get("left_out", [])}
    frame = frame[~frame["participant_id"].astype(str).isin(gone)]
    cols = list(t["between_weights"])
    x = frame[cols].to_numpy(dtype=float)
    lw = np.array([t["between_weights"][c] for c in cols], dtype=float).T
    c = len(next(iter(t["within_weights"].values())))
    eye = np.eye(c)
    test = "t" if h["test"] == "t" and lw.shape[0] * c == 1 else "F"
    return sensitivity(np.kron(x, eye), np.kron(lw, eye), test, h.get("tail", "two-sided"), alpha, None)


# ----- sphericity ------------------------------------------------------------------------------------
def sphericity_html(d: FolderData, name: str, mask: np.ndarray) -> str:
    """For an F test with more than one within df: the Greenhouse-Geisser and Huynh-Feldt epsilons over the
    mask and the voxels significant with the GG-corrected p (nothing otherwise)."""
    locs = d.locations
    gg_path, hf_path, pgg_path, phf_path = (locs.map(name, k) for k in ("epsilon_gg", "epsilon_hf", "p_gg", "p_hf"))
    if gg_path is None or hf_path is None:
        return ""
    gg, hf = d.load_map(gg_path)[mask], d.load_map(hf_path)[mask]
    words = (f"Sphericity (F with more than one within df): Greenhouse-Geisser epsilon median "
             f"{num(float(np.nanmedian(gg)))} (2nd to 98th percentile {num(float(np.nanpercentile(gg, 2)))} to "
             f"{num(float(np.nanpercentile(gg, 98)))}), Huynh-Feldt epsilon median {num(float(np.nanmedian(hf)))}; "
             "1 means sphericity holds, the lower bound is 1/(within df).")
    if pgg_path is not None:
        pgg = d.load_map(pgg_path)[mask]
        words += (f" {int(np.count_nonzero(pgg < 0.05))} of {pgg.size} with the Greenhouse-Geisser corrected "
                  "p < 0.05 (uncorrected for multiple comparisons; map p_gg)")
        if phf_path is not None:
            words += f", {int(np.count_nonzero(d.load_map(phf_path)[mask] < 0.05))} with the Huynh-Feldt corrected p"
        words += "."
    return paragraph(words)


def stratum_paragraph(d: FolderData, name: str) -> str:
    """Where a hypothesis is tested, with its df from the summary (voxel fits)."""
    t = stratum_tests(d).get(name)
    if t is None:
        return ""
    df = ""
    if d.summary_table is not None and "df2" in d.summary_table:
        row = d.summary_table[d.summary_table["hypothesis"].astype(str) == name]
        if len(row):
            df = f"; df1 {num(float(row['df1'].iloc[0]))}, df2 {num(float(row['df2'].iloc[0]))}"
    return paragraph(f"Tested in the {t['stratum']} stratum on {t.get('transformed_data', '')} "
                     f"({t.get('participants')} participants{df}).")


def table_fit_words(d: FolderData, outcome: str) -> str:
    """The opening line of a table fit with within-participant factors."""
    s = strata_of(d) or {}
    return (f"Outcome {outcome}: {len(d.design_frame)} observations of {s.get('participants')} participants; "
            "each hypothesis is tested in its error stratum (columns stratum, df2 and participants; for F tests "
            "with more than one within df the Greenhouse-Geisser and Huynh-Feldt epsilons and the GG-corrected "
            "p in epsilon_gg, epsilon_hf, p_gg). Cell means and their 95% intervals come from each within "
            "cell's values fitted with the between-participant design.")


__all__ = ["observations_html", "sphericity_html", "strata_html", "strata_of", "stratum_cell",
           "stratum_paragraph", "stratum_sensitivity", "stratum_tests", "table_fit_words"]
