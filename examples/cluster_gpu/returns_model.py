"""A product-return classifier in torch: the objective of the cluster example.

An online shop predicts which orders will be sent back, from order and
customer features, with a small MLP trained on a GPU where the worker has one
(and on the CPU otherwise, as in this repository's tests). The orders are
invented and generated here, the same on every call. Score: validation log
loss (minimize); the accuracy is reported as a second metric.
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any

import numpy as np
import torch
from torch import nn


@lru_cache(maxsize=1)
def orders() -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(7)
    n, d = 3000, 16
    X = rng.normal(0, 1, (n, d)).astype(np.float32)
    # size mismatches, first orders and discounted items drive returns; most features are noise
    logit = 1.2 * X[:, 0] - 0.8 * X[:, 1] + 0.9 * X[:, 2] * X[:, 3] + 0.6 * np.sin(2 * X[:, 4]) - 0.7
    y = (rng.random(n) < 1 / (1 + np.exp(-logit))).astype(np.float32)
    return X, y


def evaluate(config: dict[str, Any]) -> dict[str, float]:
    device = torch.device("cuda" if torch.cuda.is_available() else "cpu")
    torch.set_num_threads(1)  # one attempt per worker thread; do not oversubscribe the cores
    torch.manual_seed(0)
    X, y = orders()
    X_tr, y_tr = torch.from_numpy(X[:2000]).to(device), torch.from_numpy(y[:2000]).to(device)
    X_va, y_va = torch.from_numpy(X[2000:]).to(device), torch.from_numpy(y[2000:]).to(device)
    hidden = int(config["hidden"])
    model = nn.Sequential(
        nn.Linear(X.shape[1], hidden), nn.ReLU(), nn.Dropout(float(config["dropout"])),
        nn.Linear(hidden, hidden), nn.ReLU(), nn.Linear(hidden, 1),
    ).to(device)
    opt = torch.optim.AdamW(model.parameters(), lr=float(config["lr"]), weight_decay=float(config["weight_decay"]))
    loss_fn = nn.BCEWithLogitsLoss()
    gen = torch.Generator(device="cpu").manual_seed(0)
    for _ in range(25):
        model.train()
        for idx in torch.randperm(len(X_tr), generator=gen).split(128):
            idx = idx.to(device)
            opt.zero_grad()
            loss_fn(model(X_tr[idx]).squeeze(1), y_tr[idx]).backward()
            opt.step()
    model.eval()
    with torch.no_grad():
        logits = model(X_va).squeeze(1)
        val_loss = float(loss_fn(logits, y_va))
        acc = float(((logits > 0).float() == y_va).float().mean())
    return {"val_logloss": val_loss, "val_accuracy": acc, "on_gpu": float(device.type == "cuda")}
