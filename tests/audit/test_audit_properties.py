"""Property test: for randomly chosen codings, references, terms and covariate treatments, the files groupmodel
builds pass ``check`` without error or warning, every column is explained, and every contrast is recognised as
the spec hypothesis of its own name (row spaces compared in observation space; a fact of linear algebra: two
estimable contrasts of designs with the same column space test the same hypothesis iff L1 X1+ and L2 X2+ have
the same row space -- from memory, common practice).
"""

from __future__ import annotations

import json
import tempfile
from pathlib import Path

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from groupmodel import build
from groupmodel.audit import audit

TABLE = Path(__file__).resolve().parents[2] / "example_study" / "participants.tsv"
LEVELS = ["sprint", "endurance", "rest"]


@st.composite
def specs(draw: st.DrawFn) -> dict:
    t_coding = draw(st.sampled_from(["effect", "treatment", "polynomial"]))
    c_coding = draw(st.sampled_from(["effect", "treatment"]))
    order = draw(st.permutations(LEVELS))
    factors = {"training": {"levels": list(order), "coding": t_coding},
               "chronotype": {"coding": c_coding}}
    if t_coding != "polynomial" and draw(st.booleans()):
        factors["training"]["reference"] = draw(st.sampled_from(LEVELS))
    interaction = draw(st.booleans())
    center = draw(st.sampled_from(["mean", "none", 30]))
    scale = draw(st.sampled_from(["none", "sd"]))
    at = draw(st.sampled_from(LEVELS))
    hyps = {
        "training": {"main": "training"},
        "chronotype": {"main": "chronotype"},
        "sprint_vs_rest": {"compare": {"training": ["sprint", "rest"]}},
        f"late_vs_early_at_{at}": {"compare": {"chronotype": ["late", "early"]}, "at": {"training": at}},
        "age": {"slope": "age"},
        "rest_early_mean": {"mean": {"training": "rest", "chronotype": "early"}},
    }
    if interaction:
        hyps["training_by_chronotype"] = {"interaction": ["training", "chronotype"]}
    return {"participants": str(TABLE), "factors": factors,
            "covariates": {"age": {"center": center, "scale": scale}},
            "terms": ["training*chronotype" if interaction else "training + chronotype".split(" + ")[0],
                      *([] if interaction else ["chronotype"]), "age"],
            "hypotheses": hyps}


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(specs())
def test_generated_files_are_recognised(raw: dict) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        spec = Path(tmp) / "model.json"
        spec.write_text(json.dumps(raw))
        model = build(spec)
        out = model.write(Path(tmp) / "design", pictures=False)
        report = audit(out / "design.tsv", out / "contrasts.tsv", TABLE, spec=spec)
    assert report.exit_code == 0, report.format()
    assert not report.warnings, report.format()
    assert all(c.kind != "unexplained" for c in report.columns), report.format()
    for con in report.contrasts:
        assert con.name in con.spec_matches, report.format()
