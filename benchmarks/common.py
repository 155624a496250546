"""Shared benchmark fixtures: the Wisconsin breast-cancer logistic-regression posterior.

Data: scikit-learn's copy of the UCI Wisconsin diagnostic breast-cancer set (569 rows,
30 features), standardised, with an intercept column; prior N(0, 5^2) on every weight.
"""

import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np


def breast_cancer_data(dtype=np.float32):
    from sklearn.datasets import load_breast_cancer

    X, y = load_breast_cancer(return_X_y=True)
    X = (X - X.mean(0)) / X.std(0)
    X = np.column_stack([np.ones(len(X)), X])
    return jnp.asarray(X, dtype), jnp.asarray(y, dtype)


def logistic_log_p(w, data):
    X, y = data
    z = X @ w
    return jnp.sum(y * z - jnp.logaddexp(0.0, z)) + jnp.sum(jst.norm.logpdf(w, 0.0, 5.0))
