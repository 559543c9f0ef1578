"""The sections every report has: the study, the design, the hypotheses, their sensitivity, the caution;
and the table-level fit."""

from __future__ import annotations

import base64
from typing import Any

import numpy as np
import pandas as pd

from ...text import DISCLAIMER
from .data import FolderData
from .page import esc, figure, num, paragraph, table
from .picture import Picture
from .sensitivity import ALPHA, POWER, sensitivity
from .strata import (
    observations_html,
    strata_html,
    strata_of,
    stratum_cell,
    stratum_sensitivity,
    table_fit_words,
)

Section = tuple[str, str, str]


def study_section(d: FolderData) -> Section:
    ids = d.design_frame["participant_id"].astype(str).tolist()
    people = f"{len(ids)} observations"
    if strata_of(d) is not None:  # several images per participant: each participant named once
        ids = list(dict.fromkeys(ids))
        people = f"{len(d.design_frame)} observations (images) of {len(ids)} participants"
    parts = [paragraph(f"{people} included (participants table: {d.design.get('participants')}; "
                       f"spec: {d.design.get('spec')})."),
             f'<p class="note">Included: {esc(", ".join(ids))}</p>']
    excluded = d.design.get("excluded", [])
    if excluded:
        parts.append(f"<h3>Left out ({len(excluded)})</h3>")
        parts.append(table(["participant", "table row", "reason"],
                           [(e.get("participant_id"), e.get("row"), e.get("reason")) for e in excluded],
                           ident="exclusions"))
    else:
        parts.append(paragraph("No participant was left out."))
    parts.append(_cells_html(d))
    if strata_of(d) is not None:  # several images per participant
        parts.append(observations_html(d))
    return ("study", "The study", "".join(parts))


def _cells_html(d: FolderData) -> str:
    cells = d.design.get("cells", [])
    if not cells or not cells[0].get("cell"):
        return paragraph("The design has no factors: one group.")
    factors = list(cells[0]["cell"])
    counts = [int(c["count"]) for c in cells]
    balance = ("balanced: every cell has the same count" if len(set(counts)) == 1
               else f"not balanced: cells hold {min(counts)} to {max(counts)} observations")
    covs = _covariates(d, factors)
    headers = [*factors, "count", *[f"{c} {s}" for c in covs for s in ("mean", "SD", "min", "max")]]
    rows = []
    for c in cells:
        row: list[Any] = [c["cell"][f] for f in factors] + [int(c["count"])]
        for cov in covs:
            row += _summary(d.included, factors, c["cell"], cov)
        rows.append(row)
    return (f"<h3>Cells</h3>{paragraph(balance)}" + table(headers, rows, ident="cells")
            + ("" if d.included is not None else paragraph("Covariate summaries need participants_included.tsv, "
                                                           "which this folder lacks.", "note")))


def _covariates(d: FolderData, factors: list[str]) -> list[str]:
    if d.included is None:
        return []
    return [c for c in d.included.columns if c not in ("participant_id", *factors)
            and pd.api.types.is_numeric_dtype(d.included[c])]


def _summary(frame: pd.DataFrame | None, factors: list[str], cell: dict[str, str], cov: str) -> list[Any]:
    assert frame is not None
    sel = np.ones(len(frame), dtype=bool)
    for f in factors:
        sel &= frame[f].astype(str).to_numpy() == str(cell[f])
    v = frame.loc[sel, cov].to_numpy(dtype=float)
    if v.size == 0:
        return [None] * 4
    sd = float(np.std(v, ddof=1)) if v.size > 1 else float("nan")
    return [float(v.mean()), sd, float(v.min()), float(v.max())]


# ----- the design --------------------------------------------------------------------------------------
def design_section(d: FolderData, pictures: bool) -> Section:
    from ..numbers import tidy

    names = d.contrasts["columns"]
    x = d.matrix
    ids = d.design_frame["participant_id"].astype(str).tolist()
    pics: tuple[Picture | None, Picture | None] = (None, None)
    if pictures:  # the pictures of the folder when it has them, else drawn now
        from ..figures import contrasts_figure, design_figure
        from .plots import to_picture

        rows, labels, tests = _contrast_rows(d)
        pics = (_png(d, "design.png") or to_picture(design_figure(tidy(x, axis=0), names, ids)),
                _png(d, "contrasts.png") or to_picture(contrasts_figure(tidy(rows, axis=1), labels, names, tests)))
    body = ['<div class="figrow">',
            figure(pics[0], "The design: one row per observation, one column per regressor.", "design matrix"),
            figure(pics[1], "The contrasts over the same columns.", "contrast weights"), "</div>"]
    des = d.design
    strata = strata_of(d) is not None
    body.append(table(["property", "value"], [
        ("observations x columns", f"{x.shape[0]} x {x.shape[1]}"), ("rank", des.get("rank")),
        ("condition number (columns scaled to unit length)", des.get("condition_number")),
        ("residual degrees of freedom", "per hypothesis, in its error stratum (below)" if strata
         else x.shape[0] - int(des.get("rank") or 0))], ident="design-properties"))
    if strata:
        body.append(strata_html(d))
    vif = des.get("variance_inflation")
    if vif:
        body.append("<h3>Variance inflation</h3>" + table(["column", "VIF"], list(vif.items()), ident="vif"))
    body.append("<h3>Correlations between columns</h3>" + _correlations(x, names))
    body.append("<h3>Findings of the checks</h3>" + _findings(des.get("findings", [])))
    return ("design", "The design", "".join(body))


def _png(d: FolderData, name: str) -> Picture | None:
    """A PNG of the folder as an embedded picture (None when the folder lacks it)."""
    path = d.locations.top(name)
    if path is None:
        return None
    data = path.read_bytes()
    if data[:8] != b"\x89PNG\r\n\x1a\n":
        return None
    width, height = int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
    return Picture("data:image/png;base64," + base64.b64encode(data).decode("ascii"), width, height)


def _contrast_rows(d: FolderData) -> tuple[np.ndarray, list[str], list[str]]:
    names = d.contrasts["columns"]
    rows, labels, tests = [], [], []
    for hname, h in d.hypotheses.items():
        w = weight_matrix(h, names)
        for i, r in enumerate(w):
            rows.append(r)
            labels.append(hname if len(w) == 1 else f"{hname} {i + 1}")
            tests.append(h["test"])
    return (np.array(rows) if rows else np.zeros((0, len(names)))), labels, tests


def weight_matrix(h: dict[str, Any], names: list[str]) -> np.ndarray:
    """The rows of a hypothesis over the design columns (q, p)."""
    return np.array([h["weights"][c] for c in names], dtype=float).T.reshape(-1, len(names))


def _correlations(x: np.ndarray, names: list[str]) -> str:
    varying = [j for j in range(x.shape[1]) if np.ptp(x[:, j]) > 0]
    if len(varying) < 2:
        return paragraph("Fewer than two columns vary: no correlations to show.")
    r = np.corrcoef(x[:, varying], rowvar=False)
    head = "".join(f"<th>{esc(names[j])}</th>" for j in varying)
    body = []
    for a, ja in enumerate(varying):
        cells = []
        for b in range(len(varying)):
            v = float(r[a, b]) + 0.0
            v = round(v, 12) + 0.0
            shade = f"rgba(181,84,47,{abs(v) * 0.55:.2f})" if a != b else "transparent"
            cells.append(f'<td class="num" style="background:{shade}">{num(round(v, 2) + 0.0)}</td>')
        body.append(f"<tr><th>{esc(names[ja])}</th>{''.join(cells)}</tr>")
    return (f'<div class="wide"><table id="correlations"><thead><tr><th></th>{head}</tr></thead><tbody>'
            f'{"".join(body)}</tbody></table></div>'
            + paragraph("Pearson correlations over the observations, to 2 decimals; darker cells are stronger.",
                        "note"))


def _findings(findings: list[dict[str, Any]]) -> str:
    if not findings:
        return paragraph("The checks found nothing to report.")
    items = "".join(f'<li class="finding-{esc(f.get("severity", "note"))}">{esc(f.get("severity", "note"))}: '
                    f'{esc(f.get("message", ""))}</li>' for f in findings)
    return f'<ul id="findings">{items}</ul>'


# ----- the hypotheses ----------------------------------------------------------------------------------
def hypotheses_section(d: FolderData) -> Section:
    strata = any(h.get("stratum") is not None for h in d.hypotheses.values())
    headers = ["name", "test", "tail", "statement over cell means", "weights over cells", "estimable",
               *(["stratum"] if strata else [])]
    rows = []
    for name, h in d.hypotheses.items():
        row = [esc(name), esc(h["test"]), esc(h.get("tail", "")), esc(h.get("statement", "")),
               _cell_weights_html(h), "yes" if h.get("estimable", True) else '<span class="finding-error">no</span>']
        if strata:
            row.append(stratum_cell(h))
        rows.append(row)
    return ("hypotheses", "The hypotheses", table(headers, rows, ident="hypotheses-table", raw=True))


def _cell_weights_html(h: dict[str, Any]) -> str:
    cells = h.get("weights_over_cells") or h.get("slope_weights_over_cells")
    if not cells:
        return '<span class="note">over columns only</span>'
    lines = []
    n_rows = len(np.atleast_1d(cells[0]["weight"]))
    for i in range(n_rows):
        parts = [f"{esc(', '.join(map(str, c['cell'].values())) or 'all')}: "
                 f"{num(float(np.atleast_1d(c['weight'])[i]))}"
                 for c in cells if float(np.atleast_1d(c["weight"])[i]) != 0.0]
        lines.append(("row " + str(i + 1) + ": " if n_rows > 1 else "") + "; ".join(parts))
    prefix = f"slope of {esc(h['slope_of'])} in " if h.get("slope_of") else ""
    return prefix + "<br>".join(lines)


# ----- sensitivity -------------------------------------------------------------------------------------
def sensitivity_section(d: FolderData, sigma: float | None, tests: int, sigma_words: str) -> Section:
    """The standard error factor and the smallest effect detectable with 80% power, per hypothesis."""
    x = d.matrix
    bonf = ALPHA / max(tests, 1)
    strata = strata_of(d) is not None
    if strata:  # each hypothesis in its stratum, in units of that stratum's residual SD
        sigma_words = "residual SDs of the data of the hypothesis's error stratum"
    rows = []
    for name, h in d.hypotheses.items():
        if not h.get("estimable", True):
            continue
        w = weight_matrix(h, d.contrasts["columns"])
        tail = h.get("tail", "two-sided")
        if strata:
            a, b = (stratum_sensitivity(d, name, h, level) for level in (ALPHA, bonf))
            if a is None or b is None:
                continue
            h = {**h, "test": "t" if a.smallest_effect is not None else "F"}
        else:
            a = sensitivity(x, w, h["test"], tail, ALPHA, sigma)
            b = sensitivity(x, w, h["test"], tail, bonf, sigma)
        factor = "; ".join(num(f) for f in a.se_factor)
        if h["test"] == "t":
            rows.append((name, "t", factor, a.smallest_effect, b.smallest_effect))
        else:
            rows.append((name, "F", factor, f"lambda {num(a.noncentrality)}, f {num(a.cohen_f)}",
                         f"lambda {num(b.noncentrality)}, f {num(b.cohen_f)}"))
    text = (f"The standard error factor sqrt(L (X'X)^-1 L') depends on the design alone. Smallest effect "
            f"detected with {int(POWER * 100)}% power: for a t test |L b| in {sigma_words}; for an F test the "
            "noncentrality lambda of the noncentral F and Cohen's f = sqrt(lambda / n). Levels: uncorrected "
            f"p < {num(ALPHA)}, and Bonferroni p < {num(ALPHA)} / {tests} = {num(bonf)}.")
    headers = ["hypothesis", "test", "SE factor", f"smallest effect, p < {num(ALPHA)}",
               f"smallest effect, Bonferroni p < {num(bonf)}"]
    return ("sensitivity", "Sensitivity", paragraph(text) + table(headers, rows, ident="sensitivity-table"))


# ----- table-level fit ---------------------------------------------------------------------------------
def table_fit_section(d: FolderData, pictures: bool) -> Section:
    assert d.results is not None
    side = d.results_sidecar or {}
    outcome = side.get("outcome", "outcome")
    sd = float(np.sqrt(side["residual_variance"])) if "residual_variance" in side else float("nan")
    words = (table_fit_words(d, outcome) if strata_of(d) is not None else
             f"Outcome {outcome}: {side.get('n_observations')} observations, {side.get('df_resid')} "
             f"residual degrees of freedom, residual SD {num(sd)}.")
    body = [paragraph(words),
            table(list(d.results.columns), d.results.itertuples(index=False, name=None), ident="results")]
    if d.cell_means is not None:
        body.append("<h3>Estimated cell means</h3>")
        body.append(figure(_interaction(d.cell_means, outcome) if pictures else None,
                           "Estimated cell means with 95% confidence intervals (covariates at their centres).",
                           "interaction plot of cell means"))
        body.append(table(list(d.cell_means.columns), d.cell_means.itertuples(index=False, name=None),
                          ident="cell-means"))
    return ("table-fit", "Table-level fit", "".join(body))


CELL_MEAN_STATS = ("count", "estimate", "se", "ci_low", "ci_high")


def _interaction(cm: pd.DataFrame, outcome: str) -> Picture | None:
    from .plots import CellLine, interaction_plot

    factors = [c for c in cm.columns if c not in CELL_MEAN_STATS]
    if not factors:
        return None
    xf = factors[0]
    x_levels = list(dict.fromkeys(cm[xf].astype(str)))
    groups = [((), cm)] if len(factors) == 1 else list(cm.groupby([f for f in factors[1:]], sort=False))
    lines = []
    for key, g in groups:
        by = dict(zip(g[xf].astype(str), g.itertuples(index=False), strict=True))
        est = np.array([by[lv].estimate if lv in by else np.nan for lv in x_levels])
        lo = np.array([by[lv].ci_low if lv in by else np.nan for lv in x_levels])
        hi = np.array([by[lv].ci_high if lv in by else np.nan for lv in x_levels])
        label = ", ".join(f"{f}={k}" for f, k in zip(factors[1:], np.atleast_1d(key), strict=False))
        lines.append(CellLine(label, est, lo, hi))
    title = f"{xf} across its levels" + (f", one line per level of {', '.join(factors[1:])}" if len(factors) > 1
                                         else "")
    return interaction_plot(xf, x_levels, lines, outcome, title)


def caution_section() -> Section:
    return ("caution", "Caution", f'<p class="caution">{esc(DISCLAIMER)}</p>')


__all__ = ["caution_section", "design_section", "hypotheses_section", "sensitivity_section", "study_section",
           "table_fit_section", "weight_matrix"]
