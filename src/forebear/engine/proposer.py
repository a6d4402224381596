"""The proposal engine's one entry point for the controller.

The controller hands over what it knows (observations, failures, pending
configurations) and asks for ``n`` configurations; it never sees the
surrogate, the acquisition or the warm start directly. Scores given to the
proposer are lower-is-better (the controller multiplies a ``maximize``
metric by -1).

How a call is answered (docs/engine.md has the reasons and the figures):

1. The initial design (warm start from history, else a Latin hypercube) of
   at least ``min(dim + 1, 10)`` configurations, source ``initial``.
2. Then the surrogate: the plain GP without history; with history, the meta-trained deep kernel
   (offset, amplitude and residual refitted in closed form on this search) under the transfer
   guard, which scores both models prequentially. Failed configurations enter the targets with
   the worst observed score; pending ones (running trials) under the ``pending_lie``, earlier
   points of the same round under the ``lie``. Source ``model``.
3. While the model has too few scores: more of the design (``initial``); random points
   (``random``) only when neither has a new one.

The meta-trained state is cached on disk (``cache_dir``, default
``$FOREBEAR_CACHE`` or ``~/.cache/forebear``) as a ``state_dict`` of tensors,
keyed by a hash of the history contents, the space and the settings, and
loaded with ``torch.load(weights_only=True)``.
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import torch

from forebear.core.space import Space
from forebear.engine import acquisition
from forebear.engine.agreement import Agreement, verdict
from forebear.engine.cache import default_cache_dir, load_or_train
from forebear.engine.proposals import Observation, Proposal
from forebear.engine.refits import Refits
from forebear.engine.runtime import finite as _finite
from forebear.engine.runtime import threads as _threads
from forebear.engine.spread import Spread
from forebear.engine.surrogate.deep_kernel import MetaModel, Settings, cache_key
from forebear.engine.surrogate.gp import Posterior, as_tensor, feasibility
from forebear.engine.surrogate.select import Choice, Prequential, choose
from forebear.engine.warmstart import GPImputer, covered_size, extend_design, initial_design

MODELS = ("auto", "gp", "deep-kernel")
FAILED = ("impute", "classifier")
HISTORY_SHARE = 1.0  # of the initial design from history; 0.5 measured worse (docs/engine.md)
GUARD_FROM = 3  # observations before the guard fits the plain GP next to the deep kernel
DEFAULT_FAILED = "impute"  # chosen by `python -m forebear.bench.proposal failures` (docs/engine.md)


class Proposer:
    """Proposes batches for one search.

    Parameters
    ----------
    space
        The search space.
    history
        Earlier searches aligned to ``space`` (``forebear.records.history.History``) or ``None``.
    seed
        Seed for every random choice.
    warm_start
        With history, start from the evolutionary warm start; otherwise a Latin hypercube.
    augment
        Task augmentation during meta-training.
    fine_tune
        At each refit, choose the deep kernel's residual amplitude on the current
        search (offset and amplitude are always refitted; the feature map never is).
    guard
        With ``model="auto"``, the transfer guard picks or mixes deep kernel and plain GP.
    model
        ``"auto"`` (deep kernel with the guard when there is history, plain GP
        otherwise), ``"gp"`` or ``"deep-kernel"`` (no guard).
    lie
        The lie for earlier points of the same round: ``"min"``, ``"mean"`` or ``"max"``
        of the observed scores, or ``"posterior"`` (the model's mean at the point).
    pending_lie
        The lie for pending configurations (trials still running), same choices.
    device
        ``"cpu"`` or ``"cuda"`` (for the deep kernel and the GP).
    cache_dir
        Folder of the meta-trained cache; ``False`` turns the cache off.
    failed
        ``"impute"`` (worst observed score as target) or ``"classifier"`` (EI times
        a probability of feasibility) for crashed or timed-out configurations.
    n_initial
        Size of the initial design; default :meth:`initial_size`.
    threads
        torch threads while proposing (restored afterwards); ``None`` leaves them alone.
    deep_kernel
        :class:`forebear.engine.surrogate.Settings` or a mapping of its fields.
    n_candidates
        Quasi-random candidates per batch.
    history_share
        With history and ``warm_start``, the fraction of the initial design taken from history
        (a Latin hypercube fills the rest).
    spread
        Scale the deep kernel by the factor :class:`forebear.engine.spread.Spread` measures on history.
    agreement
        Search without a history whose tasks do not rank configurations alike
        (:mod:`forebear.engine.agreement`; not with ``model="deep-kernel"``).
    """

    def __init__(
        self,
        space: Space,
        history: Any = None,
        seed: int = 0,
        *,
        warm_start: bool = True,
        augment: bool = True,
        fine_tune: bool = True,
        guard: bool = True,
        model: str = "auto",
        lie: str = acquisition.DEFAULT_LIE,
        pending_lie: str = acquisition.DEFAULT_PENDING_LIE,
        device: str = "cpu",
        cache_dir: str | os.PathLike[str] | bool | None = None,
        failed: str = DEFAULT_FAILED,
        n_initial: int | None = None,
        threads: int | None = 1,
        deep_kernel: Settings | Mapping[str, Any] | None = None,
        n_candidates: int = 2048,
        history_share: float = HISTORY_SHARE,
        spread: bool = True,
        agreement: bool = True,
        **more: Any,
    ) -> None:
        if more:
            msg = f"Proposer got unknown settings: {', '.join(sorted(more))}"
            raise TypeError(msg)
        choices = (("model", model, MODELS), ("lie", lie, acquisition.LIES), ("pending_lie", pending_lie, acquisition.LIES), ("failed", failed, FAILED))
        for key, value, allowed in choices:
            if value not in allowed:
                msg = f"{key} must be one of {allowed}, got {value!r}"
                raise ValueError(msg)
        if device not in ("cpu", "cuda") and not str(device).startswith("cuda:"):
            msg = f"device must be 'cpu' or 'cuda', got {device!r}"
            raise ValueError(msg)
        if str(device).startswith("cuda") and not torch.cuda.is_available():
            msg = f"device {device!r} asked for, but torch finds no CUDA device"
            raise ValueError(msg)
        tasks = [t for t in (getattr(history, "tasks", history) or []) if len(t.y) >= 2]
        if model == "deep-kernel" and not tasks:
            raise ValueError("model 'deep-kernel' needs a history with at least one task of two or more scored trials")
        self.space = space
        self.history = history
        self.tasks = tasks
        self.seed = seed
        self.warm_start, self.guard, self.fine_tune = warm_start, guard, fine_tune
        self.model, self.lie, self.failed, self.device = model, lie, failed, device
        self.pending_lie = pending_lie
        self.n_initial, self.threads, self.n_candidates = n_initial, threads, n_candidates
        if not 0.0 <= history_share <= 1.0:
            msg = f"history_share must be in [0, 1], got {history_share}"
            raise ValueError(msg)
        self.history_share = history_share
        self._impute = GPImputer(tasks, seed)  # fits a task's GP when first asked; warm start and spread share it
        self._spread = Spread(space, tasks, self._impute, seed=seed) if spread and tasks else None
        dk = deep_kernel if isinstance(deep_kernel, Settings) else Settings(**dict(deep_kernel or {}))
        # Meta-training uses the deep-kernel settings' own seed (0 unless given), not the search's:
        # searches that share a history then share one cache entry.
        self.settings = replace(dk, augment=augment)
        self.use_meta = bool(tasks) and model in ("auto", "deep-kernel")
        self._check = agreement and model != "deep-kernel" and bool(tasks)  # check_history still to run
        self.history_agreement: Agreement | None = None  # what it measured
        if cache_dir is False:
            self.cache_dir: Path | None = None
        elif cache_dir is None or cache_dir is True:
            self.cache_dir = default_cache_dir()
        else:
            self.cache_dir = Path(cache_dir)
        self._rng = np.random.default_rng(seed)
        self._initial: list[dict[str, Any]] | None = None
        self._k: int | None = None
        self._covered: int | None = None  # initial_size's design size with history
        self._meta: MetaModel | None = None
        self._gp = Refits(seed, device)  # the plain GP across rounds (engine/refits.py)
        # Encodings of configurations seen so far (None: outside the space). A search hands the
        # same observations to every round; each is validated and encoded once, not per round.
        self._rows: dict[tuple[Any, ...], np.ndarray | None] = {}
        self.meta_seconds: float | None = None  # time spent meta-training or loading the cache
        self.meta_cached: bool | None = None  # whether the state came from the cache
        self.last_choice: Choice | None = None
        # The transfer guard's state across rounds: running prequential scores, and the
        # observations (by encoding) that the kept models have already seen or scored.
        self._preq = Prequential()
        self._scored_keys: set[bytes] = set()

    # -- meta-training and its cache -----------------------------------------

    def meta_model(self) -> MetaModel | None:
        """The meta-trained deep kernel (trained or loaded on first use), or ``None``."""
        self.check_history()
        if not self.use_meta:
            return None
        if self._meta is None:
            with _threads(self.threads):
                self._meta = self._load_or_train()
        return self._meta

    def cache_path(self) -> Path | None:
        if self.cache_dir is None or not self.use_meta:
            return None
        key = cache_key(self.history_hash(), self.space.to_dict(), self.settings)
        return self.cache_dir / f"deep-kernel-{key}.pt"

    def history_hash(self) -> str:
        h = getattr(self.history, "hash", None)
        from forebear.records.history import History  # a plain list of tasks hashes like a History

        return str(h()) if callable(h) else History(list(self.tasks)).hash()

    def check_history(self) -> str | None:
        """Once: drop a history whose tasks disagree (:mod:`forebear.engine.agreement`); a line
        for the user, or ``None`` when there was nothing to check."""
        if not self._check:
            return None
        self._check = False
        with _threads(self.threads):
            use, self.history_agreement, note = verdict(self.space, self.tasks, self._impute, self.seed)
        if not use:
            self.tasks, self.use_meta, self._spread, self._impute = [], False, None, GPImputer([], self.seed)
        return note

    def _load_or_train(self) -> MetaModel:
        meta, self.meta_seconds, self.meta_cached = load_or_train(
            lambda: MetaModel(self.space.dim, self.settings, self.device), [(t.X, t.y) for t in self.tasks],
            self.cache_path(), self.device)
        return meta

    # -- proposing -----------------------------------------------------------

    def propose(
        self,
        n: int,
        observed: Sequence[Observation],
        failed: Sequence[Mapping[str, Any]] = (),
        pending: Sequence[Mapping[str, Any]] = (),
    ) -> list[Proposal]:
        """``n`` new configurations, distinct from ``observed``, ``failed``, ``pending`` and each other."""
        if n <= 0:
            return []
        with _threads(self.threads):
            obs = [o for o in observed if self._row(o.config) is not None]
            fail = [c for c in failed if self._row(c) is not None]
            pend = [c for c in pending if self._row(c) is not None]
            seen = set(acquisition.keys(self._encode([o.config for o in obs] + fail + pend)))
            out: list[Proposal] = []
            # The initial design covers the first k trials of a search; a search that already
            # has k trials (say, one resumed from its logbook) goes straight to the model.
            k = self._k = self._k or self.initial_size(n)
            room = k - (len(obs) + len(fail) + len(pend))
            if self._initial is None and room > 0:
                self._initial = self._design(k)
            out += self._fresh(self._initial or (), seen, min(n, room), "initial")
            scored = [o for o in obs if _finite(o.score)]
            if len(out) < n and len(scored) >= self._enough(k):
                out += self._model_batch(n - len(out), scored, fail, pend + [p.config for p in out], seen)
            elif len(out) < n:
                # Too few scores for the model: more of the design, never random points.
                taken = self._encode([o.config for o in obs] + fail + pend + [p.config for p in out])
                more = extend_design(self.space, n - len(out), taken, seed=self.seed + len(taken))
                out += self._fresh(more, seen, n - len(out), "initial")
            for _ in range(200):  # only when neither the model nor the design has a new configuration
                if len(out) >= n:
                    break
                out += self._fresh(self.space.sample(n - len(out), self._rng), seen, n - len(out), "random")
        return out

    def _enough(self, k: int) -> int:
        """Scores the model needs before it proposes: one with a meta-trained model (its prior
        carries the rest); without, the design's ``min(dim + 1, 10)`` (at least 2, at most ``k``),
        so that design points still running are replaced by more of the design, not by a GP
        fitted on two or three scores (docs/engine.md, "The asynchronous path")."""
        return 1 if self.use_meta else max(2, min(k, self.space.dim + 1, 10))

    def _fresh(self, configs: Any, seen: set[bytes], limit: int, source: str) -> list[Proposal]:
        """Up to ``limit`` of ``configs`` not in ``seen`` (which they join), as proposals of ``source``."""
        out: list[Proposal] = []
        for config in configs:
            if len(out) >= limit:
                break
            key = acquisition.keys(self.space.encode(config)[None, :])[0]
            if key not in seen:
                seen.add(key)
                out.append(Proposal(dict(config), source))
        return out

    def _row(self, config: Mapping[str, Any]) -> np.ndarray | None:
        """The encoding of ``config`` (memoised), or ``None`` when it lies outside the space."""
        key = tuple((k, type(v).__name__, v) for k, v in sorted(config.items()))
        if key not in self._rows:
            self._rows[key] = self.space.encode(config) if self.space.contains(config) else None
        return self._rows[key]

    def _encode(self, configs: Sequence[Mapping[str, Any]]) -> np.ndarray:
        """Encodings of configurations already checked by :meth:`_row`, shape ``(n, dim)``."""
        rows = [self._row(c) for c in configs]
        return np.vstack(rows) if rows else np.zeros((0, self.space.dim))

    def initial_size(self, batch: int) -> int:
        """Size of the initial design for a first round of ``batch``: ``n_initial`` when given, else
        ``max(batch, k)``, ``k = min(dim + 1, 10)`` cut by ``warmstart.covered_size`` with history."""
        k = min(self.space.dim + 1, 10)
        self.check_history()
        if self.n_initial is None and self.tasks and self.warm_start and self._covered is None:
            with _threads(self.threads):
                self._covered = covered_size(self.tasks, k, min(3, k), seed=self.seed)  # observed scores only: about 1 s
        return self.n_initial if self.n_initial is not None else max(batch, self._covered or k)

    def _design(self, k: int) -> list[dict[str, Any]]:
        if not (self.tasks and self.warm_start):
            return self.space.latin_hypercube(k, seed=self.seed)
        impute = self._impute if self.meta_model() is not None else None
        return initial_design(self.space, k, tasks=self.tasks, impute=impute, seed=self.seed, share=self.history_share)

    def _model_batch(
        self,
        m: int,
        scored: Sequence[Observation],
        failed: Sequence[Mapping[str, Any]],
        pending: Sequence[Mapping[str, Any]],
        seen: set[bytes],
    ) -> list[Proposal]:
        X = self._encode([o.config for o in scored])
        y = np.array([float(o.score) for o in scored])
        Xf = self._encode(failed)
        feas = None
        if len(Xf) and self.failed == "impute":
            # Failed configurations count as the worst observed score (docs/engine.md: measured better).
            X, y = np.vstack([X, Xf]), np.concatenate([y, np.full(len(Xf), y.max())])
        elif len(Xf):
            feas = self._feasibility(X, Xf)
        choice = self._choose(X, y, scored)
        self.last_choice = choice
        dev = choice.models[0].X.device
        scorer = acquisition.Scorer(choice.models, choice.weights, float(y.min()), feas)
        lie = acquisition.lie_value(y, self.lie)
        Xp = self._encode(pending)
        if len(Xp):
            scorer = scorer.lie(as_tensor(Xp, dev), acquisition.lie_value(y, self.pending_lie))
        taken = np.vstack([X, Xf, Xp]) if len(Xp) or len(Xf) else X
        anchors = X[np.argsort(y, kind="stable")[:5]]
        picks = acquisition.batch(
            self.space, scorer, m, lie, taken=taken, anchors=anchors, rng=self._rng, n_sobol=self.n_candidates,
        )
        out = []
        for x, value in picks:
            config = self.space.decode(x)
            key = acquisition.keys(self.space.encode(config)[None, :])[0]
            if key in seen:
                continue
            seen.add(key)
            out.append(Proposal(config, "model", choice.name, value if math.isfinite(value) else None))
        return out

    def _choose(self, X: np.ndarray, y: np.ndarray, scored: Sequence[Observation]) -> Choice:
        """This round's models (deep kernel and/or plain GP) and the guard's choice among them.

        Under the guard, the models kept from the previous round first score the
        observations that are new this round (prequential log score), then this
        round's models are kept for the next one.
        """
        models: dict[str, Any] = {}
        meta = self.meta_model()
        if meta is not None:
            models["deep-kernel"] = meta.posterior(X, y, fine_tune=self.fine_tune, seed=self.seed, spread=self._spread.factor(X) if self._spread else 1.0)
        if meta is None:  # the plain GP alone, integrated over its hyperparameters on few points
            return Choice(*self._gp.mixture(X, y), "gp")
        guarded = self.model == "auto" and self.guard
        if guarded and len(y) >= GUARD_FROM:
            models["gp"] = self._gp.posterior(X, y)
        if not guarded:
            return choose(models, None, prefer="deep-kernel")
        keys = acquisition.keys(self._encode([o.config for o in scored]))
        new = [i for i, k in enumerate(keys) if k not in self._scored_keys]
        if new:
            Xn = self._encode([scored[i].config for i in new])
            self._preq.score(Xn, np.array([float(scored[i].score) for i in new]))
            self._scored_keys.update(keys[i] for i in new)
        choice = choose(models, self._preq, prefer="deep-kernel")
        self._preq.keep(models)
        return choice

    def _feasibility(self, X_ok: np.ndarray, X_bad: np.ndarray) -> Posterior:
        return feasibility(X_ok, X_bad, seed=self.seed, device=self.device)
