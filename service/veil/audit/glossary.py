"""What each figure of an audit means, in one line, for readers who have not read the docs.

Keyed by the figure's kind (``FigureRow.key`` in :mod:`veil.audit.report`);
a probe's rows use the probe's own model description.
"""

from __future__ import annotations

PROBE_MODELS = {
    "linear": "a logistic regression on standardised coordinates",
    "quadratic": "a logistic regression on the leading principal components and their pairwise products",
    "kernel": "a logistic regression on an RBF-kernel approximation (local structure)",
    "trees": "gradient-boosted trees",
    "mlp": "a small neural network (one hidden layer)",
}

#: The probes of a continuous attribute.
REGRESSION_MODELS = {
    "linear": "a ridge regression on standardised coordinates",
    "trees": "gradient-boosted regression trees",
}

MEANINGS = {
    "majority": "share of the most common class among the audited rows: what a probe that learned nothing scores",
    "accuracy": "share of the audited rows that {model} labels with the right class, each row predicted by a probe "
    "trained on the other folds",
    "balanced": "the same, averaged over classes, so a small class weighs as much as a large one",
    "recall": "for each class, the share of its rows the probe labels right: a class read far better than the "
    "others is singled out",
    "gap": "how far the probe's accuracy lies from the majority baseline (far below counts too: an inverted reading)",
    "r2": "share of a continuous attribute's variance {model} predicts on held-out folds (0: no better than its "
    "mean), with a 95% bootstrap interval",
    "mae": "mean absolute error of {model} predicting a continuous attribute on held-out folds, against the "
    "mean predictor's on the same folds",
    "class_mean_gap": "largest distance of a class's mean from the overall mean, in the fitting data's whitened "
    "units; sampling alone gives about the noise level",
    "distortion": "how far vectors move, as mean squared change over the data's spread",
    "cosine": "mean cosine between each vector and its cleaned version",
    "knn_overlap": "share of each row's 10 nearest neighbours (cosine) that are still its neighbours after erasure",
    "task": "share of rows a logistic regression labels with the right task class: the use the embeddings must keep",
    "tpr_gap": "how unequal the task probe's true-positive rates are across the attribute's classes (root mean "
    "square over task classes)",
    "nn_attribute": "share of each row's 10 nearest neighbours (cosine) that share its attribute",
    "nn_task": "share of each row's 10 nearest neighbours (cosine) that share its task label",
    "ranking_share": "each class's mean share of a query's top results",
    "ranking_exposure": "each class's mean share of the attention a ranked list gives, position i weighted "
    "1 / log2(i + 1)",
    "max_skew": "how far the most over-represented class in a top list exceeds its base rate, as ln(share / base "
    "rate), averaged over queries",
    "absent_class": "share of queries whose top list has no result of some class",
    "ndkl": "divergence of each top-i prefix's class shares from the base rates, discounted by position and "
    "averaged over queries",
}
