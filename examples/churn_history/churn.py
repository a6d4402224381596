"""Per-segment customer-churn models: the objective of this example (a Python callable).

A subscription business keeps one churn classifier per customer segment and
retunes it when a segment's data changes. Segments share the same drivers of
churn (tenure, usage, support tickets, price changes, contract type) with
different weights, so earlier segments' searches are useful history for a
new one. The customers are invented and generated here, the same on every
call. The model is a small scikit-learn MLP; the score is the validation ROC
AUC (maximize) with the log loss as a second metric.
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any

import numpy as np
from sklearn.metrics import log_loss, roc_auc_score
from sklearn.neural_network import MLPClassifier
from sklearn.preprocessing import StandardScaler
from threadpoolctl import threadpool_limits

# weights of the churn drivers per segment: tenure, usage, tickets, price rise, monthly contract, interaction
SEGMENTS = {
    "smb": (1, -1.2, -0.8, 0.9, 0.7, 1.1, 0.9),
    "enterprise": (2, -1.5, -0.5, 0.6, 0.5, 1.4, 1.2),
    "consumer": (3, -1.0, -1.1, 1.0, 0.9, 0.8, 0.7),
}


@lru_cache(maxsize=4)
def dataset(segment: str) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    seed, *w = SEGMENTS[segment]
    rng = np.random.default_rng(seed)
    n = 1400
    tenure = rng.exponential(24, n)
    usage = rng.gamma(2.0, 1.0, n)
    tickets = rng.poisson(1.2, n)
    price_rise = rng.random(n) < 0.3
    monthly = rng.random(n) < 0.5
    noise = rng.normal(0, 1, (n, 20))  # features that carry nothing; the model must ignore them
    logit = (w[0] * np.log1p(tenure) / 2 + w[1] * np.log1p(usage) + w[2] * np.sqrt(tickets) + w[3] * price_rise
             + w[4] * monthly + w[5] * monthly * price_rise + 1.0)
    churn = rng.random(n) < 1 / (1 + np.exp(-logit))
    X = np.column_stack([tenure, usage, tickets, price_rise, monthly, noise]).astype(float)
    cut = 800
    scaler = StandardScaler().fit(X[:cut])
    return scaler.transform(X[:cut]), churn[:cut], scaler.transform(X[cut:]), churn[cut:]


def evaluate(segment: str, config: dict[str, Any]) -> dict[str, float]:
    X_tr, y_tr, X_va, y_va = dataset(segment)
    model = MLPClassifier(
        hidden_layer_sizes=(int(config["hidden_units"]),),
        alpha=float(config["alpha"]),
        learning_rate_init=float(config["learning_rate_init"]),
        max_iter=60,
        random_state=0,
    )
    with threadpool_limits(limits=1):
        import warnings

        from sklearn.exceptions import ConvergenceWarning

        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)  # 60 epochs is the budget, by design
            model.fit(X_tr, y_tr)
        p = model.predict_proba(X_va)[:, 1]
    return {"val_auc": float(roc_auc_score(y_va, p)), "val_logloss": float(log_loss(y_va, p))}


def evaluate_smb(config: dict[str, Any]) -> dict[str, float]:
    return evaluate("smb", config)


def evaluate_enterprise(config: dict[str, Any]) -> dict[str, float]:
    return evaluate("enterprise", config)


def evaluate_consumer(config: dict[str, Any]) -> dict[str, float]:
    return evaluate("consumer", config)
