"""Model dissimilarity matrices: from condition features or from a TSV matrix."""

import numpy as np
import pandas as pd

from foldwise.errors import InputError
from foldwise.geometry.distances import condition_pairs

__all__ = ["feature_model", "read_model_tsv", "model_vectors"]

_ABSENT = object()  # the one shared value a feature takes outside a model's `only_for` conditions


def _fail(file, field, problem, fix):
    raise InputError(file, field, problem, fix)


def feature_model(conditions, features, differ_in, only_for=None, file="the study config", field="models"):
    """A model dissimilarity: how many of the named features differ between two conditions.

    Parameters
    ----------
    conditions : sequence of str
        The analysis' conditions, in order.
    features : dict
        Condition -> {feature name: value}.
    differ_in : sequence of str
        Features counted (1 per feature that differs).
    only_for : dict, optional
        Feature -> allowed values. Conditions outside it carry no value of
        the ``differ_in`` features (all share one "absent" value), so the
        model says they are alike among themselves and unlike the others.
        E.g. ``differ_in: [shape], only_for: {modality: [seen]}``: shapes
        differ among seen conditions only.
    file, field : str
        Named in errors.

    Returns
    -------
    ndarray, shape (n_pairs,)
        Pairs in :func:`foldwise.geometry.distances.condition_pairs` order.

    Examples
    --------
    >>> features = {"a": {"f": 1}, "b": {"f": 1}, "c": {"f": 2}}
    >>> feature_model(["a", "b", "c"], features, ["f"]).tolist()
    [0.0, 1.0, 1.0]
    """
    for condition in conditions:
        if condition not in features:
            _fail(file, f"{field}.features", f"condition {condition!r} has no features", "give every condition its features")
        for name in list(differ_in) + list((only_for or {}).keys()):
            if name not in features[condition]:
                _fail(file, f"{field}.features", f"condition {condition!r} has no feature {name!r}",
                      f"add {name} to the features of {condition}")
    applies = np.ones(len(conditions), dtype=bool)
    for name, allowed in (only_for or {}).items():
        applies &= np.array([features[c][name] in list(allowed) for c in conditions])
    rows, columns = condition_pairs(len(conditions))
    count = np.zeros(rows.size)
    for name in differ_in:
        values = [features[c][name] if applies[i] else _ABSENT for i, c in enumerate(conditions)]
        count += np.array([values[i] is not values[j] and values[i] != values[j] for i, j in zip(rows, columns)], dtype=np.float64)
    return count


def read_model_tsv(path, conditions, field="models.tsv"):
    """A model dissimilarity matrix from a square TSV with condition names as header and first column.

    The first column is named ``condition``; the matrix must be symmetric
    with a zero diagonal and hold every analysis condition (others are
    ignored).
    """
    try:
        table = pd.read_csv(path, sep="\t", dtype={"condition": str})
    except (OSError, ValueError) as error:
        _fail(path, field, f"cannot read the model matrix ({error})", "give a tab-separated square matrix with a condition column")
    if "condition" not in table.columns:
        _fail(path, "condition", "no column named condition", "name the first column condition and list the condition names in it")
    table = table.set_index("condition")
    missing = [c for c in conditions if c not in table.index or c not in table.columns]
    if missing:
        _fail(path, "condition", f"conditions missing from the matrix: {', '.join(missing)}", "add a row and a column for each")
    try:
        square = table.loc[list(conditions), list(conditions)].to_numpy(dtype=np.float64)
    except ValueError:
        _fail(path, field, "the matrix holds non-numeric entries", "give numbers only")
    if not np.all(np.isfinite(square)) or not np.allclose(square, square.T) or np.any(np.diag(square) != 0):
        _fail(path, field, "the matrix is not finite, symmetric with a zero diagonal", "give a dissimilarity matrix")
    rows, columns = condition_pairs(len(conditions))
    return square[rows, columns]


def model_vectors(conditions, features, models, file="the study config", field="models"):
    """Every configured model as a ``(n_models, n_pairs)`` array (names in config order).

    A model must vary over the pairs: a constant model correlates with nothing.
    """
    vectors = []
    for index, model in enumerate(models):
        where = f"{field}[{index}]"
        if model.get("tsv"):
            vector = read_model_tsv(model["tsv"], conditions, field=f"{where}.tsv")
        else:
            vector = feature_model(conditions, features or {}, model.get("differ_in") or [], model.get("only_for"), file, where)
        if np.ptp(vector) == 0:
            _fail(file, f"{where} ({model['name']})", "the model gives every condition pair the same dissimilarity",
                  "change differ_in / only_for so the model separates some pairs from others")
        vectors.append(vector)
    return np.array(vectors)
