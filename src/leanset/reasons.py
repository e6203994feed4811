"""Reason codes: why a row of a run was kept or dropped, one code per row of the manifest.

Shared below the stages: the select stage writes the codes, the reports print their meanings.
"""

#: Reason code → its meaning.
REASONS = {
    "keep:stratum": "kept to fill its class's budget evenly across difficulty strata and, with spread, across the feature space (stratified)",
    "keep:hard": "kept as one of the hardest rows of its class (hardest)",
    "keep:easy": "kept as one of the easiest rows of its class (easiest)",
    "keep:random": "kept by a uniform random draw within its class (random)",
    "keep:sampled": "kept by an importance-sampling draw within its class, weighted by 1/its inclusion probability (importance)",
    "keep:suspect_share": "kept in the uniform draw that keeps suspected label errors at their share of the table (selection.drop_suspect_labels: share or auto)",
    "keep:floor": "kept only because its class would otherwise fall below selection.class_floor",
    "drop:over_budget": "dropped: its class's budget was filled by higher-priority rows",
    "drop:duplicate": "dropped: an exact copy (features and label) of an earlier row, which stands for it with dup_count",
    "drop:hard_cut": "dropped: among the hardest selection.hard_cut of its class, set aside as likely label noise (stratified)",
    "drop:suspect_label": "dropped: its AUM is below the threshold-sample cut-off, a suspected label error (selection.drop_suspect_labels)",
    "holdout": "in the holdout: never pruned, used only to verify",
    "keep:stable": "kept as in the parent run: its score stayed within selection.hysteresis",
    "drop:stable": "dropped as in the parent run: its score stayed within selection.hysteresis",
}
