"""Training from a patch bank: one model, hard-negative mining rounds, and cross-validated tuning.

- ``_train``: :func:`train_model` and :func:`train_with_mining` (with the mining defaults);
- ``_mining``: one mining round, :func:`mine` (scan labelled images, keep the false alarms);
- ``_tuning``: image folds and the parameter search behind ``patchwood tune``.

Public names of the three are re-exported here.
"""


from detector.training._mining import (MiningRound, mine)
from detector.training._train import (DEFAULT_MINE_ROUNDS, DEFAULT_TRAIN, MINE_TREE_SHARE,
                                      MINING_STOP_SHARE, bank_to_xy, default_features_per_node,
                                      mining_params, mining_source, train_model, train_with_mining)
from detector.training._tuning import (EVALUATION_THRESHOLD, PARAMETERS, FoldData, SearchResult,
                                       SearchSpace, TrialRecord, bank_subset, classifier_params,
                                       describe, effective_values, evaluate_params,
                                       fold_average_precision, image_folds, plot_trials,
                                       prepare_folds, search, train_command, trials_columns,
                                       write_trials_csv)

__all__ = [
    "MiningRound", "mine", "train_model", "bank_to_xy", "DEFAULT_MINE_ROUNDS", "DEFAULT_TRAIN",
    "MINE_TREE_SHARE", "MINING_STOP_SHARE", "default_features_per_node",
    "mining_source", "mining_params", "train_with_mining", "EVALUATION_THRESHOLD", "PARAMETERS",
    "FoldData", "SearchResult", "SearchSpace", "TrialRecord", "bank_subset", "classifier_params",
    "describe", "effective_values", "evaluate_params", "fold_average_precision", "image_folds",
    "plot_trials", "prepare_folds", "search", "train_command", "trials_columns", "write_trials_csv",
]
