"""participants_residuals.tsv: the per-participant check of a voxelwise fit as a table
(the sums come from :mod:`groupmodel.engine.participant_check`)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..engine.participant_check import UNUSUAL_Z, ParticipantCheck, robust_z

#: Columns of participants_residuals.tsv.
RESIDUAL_COLUMNS = ["participant_id", "mean_abs_residual", "robust_z", "unusual"]


def residual_table(participant_ids: list[str], check: ParticipantCheck,
                   groups: np.ndarray | None = None) -> pd.DataFrame:
    """One row per observation: its mean absolute residual, robust z and whether it is unusual.

    With ``groups`` (a label per observation: the variance groups of a fit that has them) the robust z is taken
    within each group, so that a group whose residuals are larger by design is not called unusual as a whole.
    """
    mean_abs = check.means()
    if groups is None:
        z = robust_z(mean_abs)
    else:
        labels = np.asarray(groups)
        z = np.empty_like(mean_abs)
        for g in np.unique(labels):
            z[labels == g] = robust_z(mean_abs[labels == g])
    return pd.DataFrame({"participant_id": participant_ids, "mean_abs_residual": mean_abs, "robust_z": z,
                         "unusual": np.asarray(z > UNUSUAL_Z)}, columns=RESIDUAL_COLUMNS)


__all__ = ["RESIDUAL_COLUMNS", "ParticipantCheck", "residual_table"]
