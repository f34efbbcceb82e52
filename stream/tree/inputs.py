"""The checks of what a caller hands either tree: feature names and kinds, and rows.

The command line reaches the trees through the encoder, which never breaks these rules;
a library caller may, and gets a :class:`ConfigError` naming the field, row and value
before any compiled code sees the rows.
"""

from __future__ import annotations

import numpy as np

from stream.checks import CATEGORY_LIMIT, VALUE_LIMIT
from stream.errors import ConfigError


def check_features(feature_names: list[str], feature_kinds: list[str]) -> None:
    """:class:`ConfigError` unless there is at least one feature and each has a kind,
    ``"numeric"`` or ``"category"``."""
    if len(feature_names) != len(feature_kinds):
        raise ConfigError("feature names and kinds must have the same length, got "
                          f"{len(feature_names)} and {len(feature_kinds)}")
    bad = [k for k in feature_kinds if k not in ("numeric", "category")]
    if bad:
        raise ConfigError(f"feature kind must be 'numeric' or 'category', got {bad[0]!r}")
    if not feature_names:
        raise ConfigError("a tree needs at least one feature, got none")


def check_rows(X: np.ndarray, feature_names: list[str],
               category_columns: np.ndarray) -> np.ndarray:
    """``X`` as C-contiguous float64 after checking its shape, that every value is NaN
    (missing) or of magnitude at most ``VALUE_LIMIT``, and that category codes are whole
    numbers in 0..CATEGORY_LIMIT-1."""
    X = np.ascontiguousarray(X, dtype=np.float64)
    if X.ndim != 2 or X.shape[1] != len(feature_names):
        raise ConfigError(f"X must have {len(feature_names)} columns, got shape {X.shape}")
    with np.errstate(invalid="ignore"):
        huge = np.abs(X) > VALUE_LIMIT
    if huge.any():
        row, col = np.argwhere(huge)[0]
        raise ConfigError(f"values must be finite numbers of magnitude at most "
                          f"{VALUE_LIMIT:g} or NaN (missing), got {float(X[row, col])!r} in "
                          f"field {feature_names[col]!r} at row {int(row)}")
    if category_columns.size:
        codes = X[:, category_columns]
        with np.errstate(invalid="ignore"):
            bad = ~np.isnan(codes) & ((codes < 0) | (codes != np.floor(codes))
                                      | (codes >= CATEGORY_LIMIT))
        if bad.any():
            row, col = np.argwhere(bad)[0]
            name = feature_names[category_columns[col]]
            raise ConfigError(f"category codes must be whole numbers in 0..{CATEGORY_LIMIT - 1}"
                              f", got {float(codes[row, col])!r} in field {name!r} at row "
                              f"{int(row)}")
    return X
