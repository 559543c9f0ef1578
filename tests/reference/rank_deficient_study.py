"""The rank-deficient study of the tests: drink {caffeine, placebo} x scanner {A, B, C} with age, no participant in
caffeine/C; its hypotheses (all estimable), its codings, and each hypothesis fitted by statsmodels twice.

References: statsmodels OLS on patsy's treatment-coded design with the dependent column dropped, and on the
cell-means model restricted to the five observed cells; each hypothesis written by hand over their coefficients.
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf

CELLS = [("caffeine", "A", 5), ("caffeine", "B", 4), ("placebo", "A", 4), ("placebo", "B", 5), ("placebo", "C", 5)]
#: name -> (spec, test); every one estimable with caffeine/C empty.
HYPOTHESES = {
    "caffeine_at_A": {"compare": {"drink": ["caffeine", "placebo"]}, "at": {"scanner": "A"}},
    "drink_over_AB": {"main": "drink", "at": {"scanner": ["A", "B"]}},
    "caffeine_minus_placebo_AB": {"compare": {"drink": ["caffeine", "placebo"]}, "at": {"scanner": ["B", "A"]}},
    "scanner_in_placebo": {"main": "scanner", "at": {"drink": "placebo"}},
    "scanner_AB": {"main": "scanner", "at": {"scanner": ["A", "B"]}},
    "interaction_AB": {"interaction": ["drink", "scanner"], "at": {"scanner": ["A", "B"]}},
    "caffeine_mean_AB": {"mean": {"drink": "caffeine"}, "at": {"scanner": ["A", "B"]}},
    "age": {"slope": "age", "tail": "greater"},
}
CODINGS = {
    "effect": {"factors": {"drink": {}, "scanner": {}}, "terms": ["drink*scanner", "age"]},
    "treatment": {"factors": {"drink": {"coding": "treatment"}, "scanner": {"coding": "treatment"}},
                  "terms": ["drink*scanner", "age"]},
    "cell_means": {"factors": {"drink": {"coding": "indicator"}, "scanner": {"coding": "indicator"}},
                   "intercept": False, "terms": ["drink:scanner", "age"]},
}


def table(seed: int = 4) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    rows = [(d, s) for d, s, k in CELLS for _ in range(k)]
    frame = pd.DataFrame(rows, columns=["drink", "scanner"])
    frame.insert(0, "participant_id", [f"sub-{i + 1:02d}" for i in range(len(frame))])
    frame["age"] = np.round(rng.uniform(20, 60, len(frame)), 1)
    cell_effect = (frame["drink"].map({"caffeine": 1.5, "placebo": 0.0})
                   + frame["scanner"].map({"A": 0, "B": .7, "C": -.4}))
    frame["score"] = np.round(cell_effect + 0.03 * frame["age"] + rng.normal(0, 1, len(frame)), 4)
    return frame


def write(folder: Path, coding: str, frame: pd.DataFrame, extra: dict | None = None) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    frame.to_csv(folder / "participants.tsv", sep="\t", index=False)
    spec = {"participants": "participants.tsv",
            "factors": {}, "covariates": {"age": {"center": "mean"}}, **CODINGS[coding],
            "hypotheses": HYPOTHESES, **(extra or {})}
    spec["factors"] = {f: {**body, "levels": lv} for (f, body), lv in
                       zip(spec["factors"].items(), (["caffeine", "placebo"], ["A", "B", "C"]), strict=True)}
    (folder / "model.json").write_text(json.dumps(spec, indent=1))
    return folder / "model.json"


def reference(frame: pd.DataFrame, y: np.ndarray) -> dict[str, dict[str, float]]:
    """Each hypothesis by statsmodels twice: reduced treatment design and observed-cell means; both must agree."""
    data = frame.assign(y=y, agec=frame["age"] - frame["age"].mean(), cell=frame["drink"] + "_" + frame["scanner"])
    # Treatment coding (reference caffeine, A); caffeine/C empty, so patsy's column
    # drink[T.placebo]:scanner[T.C] equals scanner[T.C] on the observed rows: it is dropped.  Cells then are
    # caf_A = b0, caf_B = b0 + sB, pla_A = b0 + p, pla_B = b0 + p + sB + pB, pla_C = b0 + p + sC.
    reduced = smf.ols("y ~ C(drink) + C(scanner) + C(drink):C(scanner) + agec", data)
    names = list(reduced.exog_names)
    keep = [j for j, nm in enumerate(names) if nm != "C(drink)[T.placebo]:C(scanner)[T.C]"]
    assert len(keep) == len(names) - 1
    fit_r = sm.OLS(data["y"].to_numpy(), reduced.exog[:, keep]).fit()
    kept = [names[j] for j in keep]

    def row(**w: float) -> np.ndarray:
        out = np.zeros(len(kept))
        for k, v in w.items():
            out[kept.index({"p": "C(drink)[T.placebo]", "sB": "C(scanner)[T.B]", "sC": "C(scanner)[T.C]",
                            "pB": "C(drink)[T.placebo]:C(scanner)[T.B]", "b0": "Intercept",
                            "age": "agec"}[k])] = v
        return out

    red = {
        "caffeine_at_A": ("t", [row(p=-1)]),
        "drink_over_AB": ("F", [row(p=-1, pB=-0.5)]),
        "caffeine_minus_placebo_AB": ("t", [row(p=-1, pB=-0.5)]),
        "scanner_in_placebo": ("F", [row(sC=-1), row(sB=1, pB=1, sC=-1)]),
        "scanner_AB": ("F", [row(sB=-1, pB=-0.5)]),
        "interaction_AB": ("F", [row(pB=1)]),
        "caffeine_mean_AB": ("t", [row(b0=1, sB=0.5)]),
        "age": ("t", [row(age=1)]),
    }
    # Cell means over the five observed cells.
    fit_c = smf.ols("y ~ 0 + C(cell) + agec", data).fit()
    cell_names = list(fit_c.model.exog_names)

    def cells(**w: float) -> np.ndarray:
        out = np.zeros(len(cell_names))
        for k, v in w.items():
            out[cell_names.index("agec" if k == "age" else f"C(cell)[{k}]")] = v
        return out

    cm = {
        "caffeine_at_A": ("t", [cells(caffeine_A=1, placebo_A=-1)]),
        "drink_over_AB": ("F", [cells(caffeine_A=.5, caffeine_B=.5, placebo_A=-.5, placebo_B=-.5)]),
        "caffeine_minus_placebo_AB": ("t", [cells(caffeine_A=.5, caffeine_B=.5, placebo_A=-.5, placebo_B=-.5)]),
        "scanner_in_placebo": ("F", [cells(placebo_A=1, placebo_C=-1), cells(placebo_B=1, placebo_C=-1)]),
        "scanner_AB": ("F", [cells(caffeine_A=.5, placebo_A=.5, caffeine_B=-.5, placebo_B=-.5)]),
        "interaction_AB": ("F", [cells(caffeine_A=1, caffeine_B=-1, placebo_A=-1, placebo_B=1)]),
        "caffeine_mean_AB": ("t", [cells(caffeine_A=.5, caffeine_B=.5)]),
        "age": ("t", [cells(age=1)]),
    }
    out: dict[str, dict[str, float]] = {}
    for name in HYPOTHESES:
        values = []
        for fit, (kind, rows) in ((fit_r, red[name]), (fit_c, cm[name])):
            L = np.array(rows)
            if kind == "t":
                t = fit.t_test(L)
                values.append({"statistic": float(t.tvalue.item()), "estimate": float(t.effect.item()),
                               "se": float(t.sd.item())})
            else:
                f = fit.f_test(L)
                values.append({"statistic": float(np.squeeze(f.fvalue)), "p": float(f.pvalue)})
        for key in values[0]:
            assert values[0][key] == pytest.approx(values[1][key], rel=1e-9), (name, key)  # the two agree
        out[name] = {**values[0], "df2": float(fit_c.df_resid)}
    return out


def image_study(root: Path, n_vox: tuple[int, int, int] = (4, 3, 2)) -> tuple[Path, pd.DataFrame, np.ndarray]:
    frame = table(seed=9)
    rng = np.random.default_rng(2)
    y = frame["score"].to_numpy()[:, None] * rng.uniform(0.2, 2, np.prod(n_vox)) + rng.normal(0, 1, (len(frame),
                                                                                                      np.prod(n_vox)))
    (root / "maps").mkdir(parents=True)
    for pid, values in zip(frame["participant_id"], y, strict=True):
        nib.save(nib.Nifti1Image(values.reshape(n_vox).astype(np.float32), np.eye(4)), root / "maps" / f"{pid}.nii.gz")
    spec = write(root, "effect", frame, {"images": "maps/{participant_id}.nii.gz"})
    return spec, frame, y.astype(np.float32).astype(np.float64)
