"""proposer.py: the engine end to end, its switches, its cache, and Branin."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import torch

from forebear.bench.functions import BRANIN_MIN, branin
from forebear.bench.proposal import SPACE2, SPACE3, _vec, make_history
from forebear.core.space import Space
from forebear.engine.proposer import Observation, Proposer

DK = {"max_steps": 150, "eval_every": 50, "patience": 3, "tasks_per_step": 4}
MIXED = Space.from_dict({
    "learning_rate": {"float": [1e-4, 0.3], "log": True},
    "depth": {"int": [2, 12]},
    "booster": {"categories": ["tree", "linear"]},
})


def key(c: dict) -> str:
    return repr(sorted(c.items()))


def mixed_score(c: dict) -> float:
    return (np.log10(c["learning_rate"]) + 2) ** 2 + 0.1 * (c["depth"] - 6) ** 2 + (0.5 if c["booster"] == "linear" else 0.0)


def test_cold_search_initial_then_model_and_never_repeats() -> None:
    p = Proposer(MIXED, seed=1)
    first = p.propose(5, [])  # min(dim + 1, 10) with dim 4 (the categorical takes two coordinates)
    assert [x.source for x in first] == ["initial"] * 5 and all(x.model is None for x in first)
    obs = [Observation(x.config, mixed_score(x.config)) for x in first]
    pending = [MIXED.sample(1, 7)[0]]
    nxt = p.propose(6, obs, pending=pending)
    assert len(nxt) == 6
    assert {x.source for x in nxt} == {"model"} and {x.model for x in nxt} == {"gp"}
    assert all(x.acquisition is not None and np.isfinite(x.acquisition) for x in nxt)
    seen = [key(c) for c in [o.config for o in obs] + pending] + [key(x.config) for x in nxt]
    assert len(set(seen)) == len(seen)
    for x in nxt:
        MIXED.validate(x.config)


def test_too_few_scores_extend_the_design_instead_of_random_points() -> None:
    p = Proposer(SPACE2, seed=0, n_initial=2)
    first = p.propose(2, [])
    out = p.propose(3, [], failed=[first[0].config], pending=[first[1].config])
    assert [x.source for x in out] == ["initial"] * 3
    # Space-filling: every new point keeps its distance from the two taken ones and from each other.
    X = SPACE2.encode_many([x.config for x in first] + [x.config for x in out])
    gaps = np.linalg.norm(X[:, None] - X[None, :], axis=2)[np.triu_indices(len(X), 1)]
    assert gaps.min() > 0.2


def test_initial_design_size_at_any_batch_size() -> None:
    space6 = Space.from_dict({f"x{i}": {"float": [0.0, 1.0]} for i in range(6)})
    big = Space.from_dict({f"x{i}": {"float": [0.0, 1.0]} for i in range(14)})
    assert [Proposer(space6).initial_size(b) for b in (1, 4, 12)] == [7, 7, 12]
    assert Proposer(big).initial_size(1) == 10 and Proposer(space6, n_initial=3).initial_size(8) == 3
    first = Proposer(space6, seed=2).propose(7, [])
    assert [x.source for x in first] == ["initial"] * 7


def test_failed_configurations_are_not_proposed_again() -> None:
    p = Proposer(SPACE2, seed=0)
    first = p.propose(3, [])
    obs = [Observation(x.config, branin(_vec(SPACE2, x.config))) for x in first[:2]]
    failed = [first[2].config]
    out = p.propose(5, obs, failed=failed)
    assert key(failed[0]) not in {key(x.config) for x in out}
    q = Proposer(SPACE2, seed=0, failed="classifier")
    q.propose(3, [])
    assert len(q.propose(5, obs, failed=failed)) == 5


def test_failed_region_is_avoided_by_imputation_and_by_the_classifier() -> None:
    """Scores improve towards a = 1, but every configuration with a > 0.7 failed (a crash region).

    Told nothing of the failures the model follows the trend into the region; with
    ``failed="impute"`` the failures enter the fit at the worst observed score, and with
    ``failed="classifier"`` EI is multiplied by a probability of feasibility; both stay out.
    """
    space = Space.from_dict({"a": {"float": [0.0, 1.0]}, "b": {"float": [0.0, 1.0]}})
    rng = np.random.default_rng(0)
    ok = [{"a": float(a), "b": float(b)} for a, b in zip(rng.uniform(0, 0.6, 12), rng.random(12), strict=True)]
    bad = [{"a": float(a), "b": float(b)} for a, b in zip(rng.uniform(0.7, 1.0, 10), rng.random(10), strict=True)]
    obs = [Observation(c, (c["a"] - 1) ** 2 + (c["b"] - 0.5) ** 2) for c in ok]
    worst = max(o.score for o in obs)

    def region(out: list) -> int:
        assert [x.source for x in out] == ["model"] * 4
        return sum(x.config["a"] > 0.7 for x in out)

    blind = Proposer(space, seed=0, n_initial=0)
    assert region(blind.propose(4, obs)) >= 2
    imputed = Proposer(space, seed=0, n_initial=0, failed="impute")
    assert region(imputed.propose(4, obs, failed=bad)) == 0
    # The fit saw the failures, each at the worst observed score.
    model = imputed.last_choice.models[0]
    assert len(model.X) == len(ok) + len(bad)
    np.testing.assert_allclose(model.y[len(ok):].numpy(), worst)
    classed = Proposer(space, seed=0, n_initial=0, failed="classifier")
    assert region(classed.propose(4, obs, failed=bad)) == 0
    assert len(classed.last_choice.models[0].X) == len(ok)  # failures stay out of the regression


def test_history_warm_start_deep_kernel_then_guard(tmp_path: Path) -> None:
    hist = make_history(6, 40, seed=0)
    p = Proposer(SPACE3, hist, seed=0, deep_kernel=DK, cache_dir=tmp_path)
    first = p.propose(4, [])  # the warm-start design: min(dim + 1, 10) configurations
    pool = {key(c) for t in hist.tasks for c in t.configs}
    assert [x.source for x in first] == ["initial"] * 4 and all(key(x.config) in pool for x in first)
    f = lambda c: float(np.sum((_vec(SPACE3, c) - 0.3) ** 2))  # noqa: E731
    obs = [Observation(x.config, f(x.config)) for x in first]
    second = p.propose(3, obs)
    assert {x.model for x in second} == {"deep-kernel"}  # nothing scored yet: the history model alone
    obs += [Observation(x.config, f(x.config)) for x in second]
    third = p.propose(3, obs)
    assert {x.model for x in third} <= {"gp", "deep-kernel", "mix"}
    assert p.last_choice is not None and set(p.last_choice.loglik) == {"gp", "deep-kernel"}


def test_meta_training_is_cached_as_a_plain_state_dict(tmp_path: Path) -> None:
    hist = make_history(4, 30, seed=1)
    a = Proposer(SPACE3, hist, seed=0, deep_kernel=DK, cache_dir=tmp_path)
    a.meta_model()
    assert a.meta_cached is False
    files = list(tmp_path.glob("deep-kernel-*.pt"))
    assert files == [a.cache_path()]
    state = torch.load(files[0], weights_only=True)
    assert all(isinstance(v, torch.Tensor) for v in state.values())
    b = Proposer(SPACE3, hist, seed=0, deep_kernel=DK, cache_dir=tmp_path)
    b.meta_model()
    assert b.meta_cached is True
    for k, v in a.meta_model().state_dict().items():  # type: ignore[union-attr]
        torch.testing.assert_close(v, b.meta_model().state_dict()[k])  # type: ignore[union-attr]
    c = Proposer(SPACE3, hist, seed=0, deep_kernel=DK, cache_dir=tmp_path, augment=False)
    assert c.cache_path() != a.cache_path()
    files[0].write_bytes(b"not a torch file")
    d = Proposer(SPACE3, hist, seed=0, deep_kernel=DK, cache_dir=tmp_path)
    d.meta_model()
    assert d.meta_cached is False  # an unreadable entry is retrained and replaced


def test_switches_are_real(tmp_path: Path) -> None:
    hist = make_history(4, 30, seed=2)
    gp = Proposer(SPACE3, hist, seed=0, model="gp", cache_dir=tmp_path)
    assert gp.meta_model() is None
    first = gp.propose(4, [])
    obs = [Observation(x.config, float(_vec(SPACE3, x.config).sum())) for x in first]
    assert {x.model for x in gp.propose(2, obs)} == {"gp"}
    cold = Proposer(SPACE3, hist, seed=0, warm_start=False, deep_kernel=DK, cache_dir=tmp_path)
    assert [x.config for x in cold.propose(3, [])] == SPACE3.latin_hypercube(4, seed=0)[:3]
    dk = Proposer(SPACE3, hist, seed=0, model="deep-kernel", deep_kernel=DK, cache_dir=tmp_path)
    dk.propose(3, [])
    obs6 = obs + [Observation(c, float(_vec(SPACE3, c).sum())) for c in SPACE3.sample(4, 3)]
    assert {x.model for x in dk.propose(2, obs6)} == {"deep-kernel"}
    noguard = Proposer(SPACE3, hist, seed=0, guard=False, deep_kernel=DK, cache_dir=tmp_path)
    noguard.propose(3, [])
    assert {x.model for x in noguard.propose(2, obs6)} == {"deep-kernel"}


def test_bad_arguments_are_named() -> None:
    with pytest.raises(ValueError, match="model must be one of"):
        Proposer(SPACE2, model="forest")
    with pytest.raises(ValueError, match="lie must be one of"):
        Proposer(SPACE2, lie="median")
    with pytest.raises(ValueError, match="needs a history"):
        Proposer(SPACE2, model="deep-kernel")
    with pytest.raises(TypeError, match="unknown settings: colour"):
        Proposer(SPACE2, colour="red")
    if not torch.cuda.is_available():
        with pytest.raises(ValueError, match="no CUDA device"):
            Proposer(SPACE2, device="cuda")


def test_threads_are_restored() -> None:
    # The setting is applied while proposing (observed from inside the proposer's own design
    # and model steps) and the process-wide value comes back afterwards.
    inside: list[int] = []

    class Watched(Proposer):
        def _design(self, k: int):  # noqa: ANN202 - the parent's return type
            inside.append(torch.get_num_threads())
            return super()._design(k)

        def _model_batch(self, *args, **kwargs):  # noqa: ANN002, ANN003, ANN202
            inside.append(torch.get_num_threads())
            return super()._model_batch(*args, **kwargs)

    before = torch.get_num_threads()
    torch.set_num_threads(2)
    try:
        p = Watched(SPACE2, seed=0, threads=1)
        first = p.propose(3, [])
        obs = [Observation(x.config, branin(_vec(SPACE2, x.config))) for x in first]
        p.propose(1, obs)
        assert inside == [1, 1] and torch.get_num_threads() == 2
        # threads=None leaves the process's setting alone, also inside.
        inside.clear()
        Watched(SPACE2, seed=0, threads=None).propose(2, [])
        assert inside == [2] and torch.get_num_threads() == 2
    finally:
        torch.set_num_threads(before)


def branin_run(seed: int, trials: int = 30) -> float:
    p = Proposer(SPACE2, seed=seed)
    obs: list[Observation] = []
    while len(obs) < trials:
        obs += [Observation(x.config, branin(_vec(SPACE2, x.config))) for x in p.propose(1, obs)]
    return min(o.score for o in obs)


def random_search(seeds: int, trials: int = 30) -> list[float]:
    rng = np.random.default_rng(0)
    return [min(branin(rng.random(2)) for _ in range(trials)) for _ in range(seeds)]


@pytest.mark.slow
def test_branin_sequential_30_trials_five_seeds() -> None:
    # Branin-Hoo minimum 0.397887 (Surjanovic & Bingham, Virtual Library of Simulation Experiments).
    # Measured (docs/engine.md): 5 of 5 seeds within 0.05 of the minimum after 30 trials
    # (regrets 0.037, 0.0001, 0.003, 0.0000, 0.0013; random search's mean regret 1.24).
    best = [branin_run(s) for s in range(5)]
    assert sum(b - BRANIN_MIN < 0.05 for b in best) >= 3
    assert np.mean(best) - BRANIN_MIN < 0.25 * (np.mean(random_search(5)) - BRANIN_MIN)


def test_branin_sequential_30_trials_two_seeds() -> None:
    # The default suite's short version of the five-seed test above.
    best = [branin_run(s) for s in (0, 1)]
    assert max(best) - BRANIN_MIN < 0.05
    assert np.mean(best) - BRANIN_MIN < 0.25 * (np.mean(random_search(2)) - BRANIN_MIN)


def test_proposer_pickles_before_and_after_use(tmp_path: Path) -> None:
    # The controller runs the proposer in a child process, so it must survive pickling.
    import pickle

    p = Proposer(SPACE3, make_history(4, 30, seed=3), seed=0, deep_kernel=DK, cache_dir=tmp_path)
    pickle.loads(pickle.dumps(p))
    first = p.propose(3, [])
    obs = [Observation(x.config, float(_vec(SPACE3, x.config).sum())) for x in first]
    p.propose(2, obs)
    q = pickle.loads(pickle.dumps(p))
    assert q.meta_model() is not None and len(q.propose(2, obs)) == 2


def test_searches_with_other_seeds_share_the_cache_entry(tmp_path: Path) -> None:
    hist = make_history(4, 30, seed=4)
    a = Proposer(SPACE3, hist, seed=1, deep_kernel=DK, cache_dir=tmp_path)
    b = Proposer(SPACE3, hist, seed=2, deep_kernel=DK, cache_dir=tmp_path)
    assert a.cache_path() == b.cache_path()
    a.meta_model()
    b.meta_model()
    assert b.meta_cached is True
