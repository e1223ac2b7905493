"""Fixed-lag HMM smoothing checked against hmmlearn's Viterbi on the same emissions."""

from __future__ import annotations

import json
import math
import time

import numpy as np
import pytest
from hmmlearn.hmm import GaussianHMM
from scipy.stats import norm

from gateway.smoothing import (
    AnimalSmoother,
    HmmParams,
    SmootherBank,
    default_transitions,
    stationary_distribution,
)
from gateway.types import NO_DATA, NoDataHop, Posteriors

CLASSES = ("grazing", "feeding", "ruminating", "resting", "walking")
HOP = 5.0


def sticky_matrix(rng: np.random.Generator, c: int = 5, stay: float = 0.93) -> np.ndarray:
    off = rng.dirichlet(np.ones(c), size=c)
    np.fill_diagonal(off, 0.0)
    off = off / off.sum(axis=1, keepdims=True) * (1 - stay)
    return off + np.eye(c) * stay


def gaussian_case(seed: int, n: int, spread: float = 1.0):
    """Observations from a Gaussian HMM sampled by hmmlearn, plus our posteriors for them.

    The posteriors are what a calibrated classifier would give: Bayes with the chain's
    stationary class balance (scipy's normal log-density as the emission model).
    """
    rng = np.random.default_rng(seed)
    a = sticky_matrix(rng)
    pi = stationary_distribution(a)
    hmm = GaussianHMM(n_components=5, covariance_type="diag", init_params="", params="")
    hmm.startprob_ = pi
    hmm.transmat_ = a
    hmm.means_ = rng.normal(0, 1.2, size=(5, 2))
    hmm.covars_ = np.full((5, 2), spread**2)
    x, truth = hmm.sample(n, random_state=seed)
    loglik = norm.logpdf(x[:, None, :], hmm.means_[None], spread).sum(axis=2)
    post = np.exp(loglik - loglik.max(axis=1, keepdims=True)) * pi
    post /= post.sum(axis=1, keepdims=True)
    return hmm, a, x, truth, post


def run(sm: AnimalSmoother, post: np.ndarray, t0: float = 0.0) -> list:
    out = []
    for i, p in enumerate(post):
        out.extend(sm.push(Posteriors(sm.animal, t0 + HOP * i, p)))
    return out


def labels(decisions) -> np.ndarray:
    return np.array([CLASSES.index(d.behaviour) for d in decisions])


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_full_lag_equals_hmmlearn_viterbi_exactly(seed: int) -> None:
    # Reference: hmmlearn GaussianHMM.decode(algorithm="viterbi") on the same sequence.
    n = 400
    hmm, a, x, _, post = gaussian_case(seed, n)
    _, ref = hmm.decode(x, algorithm="viterbi")
    sm = AnimalSmoother("cow", HmmParams.build(CLASSES, a, HOP, lag_s=HOP * n))
    early = run(sm, post)
    assert early == []  # nothing is decided before the lag is reached
    assert sm.pending == n
    got = labels(sm.flush())
    np.testing.assert_array_equal(got, ref)


def test_finite_lag_agreement_grows_with_lag() -> None:
    # Reference: hmmlearn full Viterbi; a fixed lag approaches it as the lag grows. Measured on
    # this sequence: agreement 0.81 (lag 0), 0.91 (6), 0.95 (12), 0.98 (24), 1.00 (48 hops).
    n = 3000
    hmm, a, x, truth, post = gaussian_case(7, n)
    _, ref = hmm.decode(x, algorithm="viterbi")
    agree, accuracy = {}, {}
    for lag in (0, 6, 12, 24, 48):
        sm = AnimalSmoother("cow", HmmParams.build(CLASSES, a, HOP, lag_s=HOP * lag))
        got = labels(run(sm, post) + sm.flush())
        assert len(got) == n
        agree[lag] = float((got == ref).mean())
        accuracy[lag] = float((got == truth).mean())
    assert agree[0] < agree[6] < agree[12] < agree[24] <= agree[48], agree
    assert agree[12] >= 0.93 and agree[48] >= 0.99, agree
    # Against the truth a 12-hop lag is as good as full Viterbi, and far better than taking
    # each window's argmax alone (the reason smoothing exists).
    full_accuracy = float((ref == truth).mean())
    assert accuracy[12] >= full_accuracy - 0.02, (accuracy, full_accuracy)
    assert accuracy[12] > float((post.argmax(axis=1) == truth).mean()) + 0.2


def test_decisions_tile_time_from_window_centres() -> None:
    params = HmmParams.build(CLASSES, None, HOP, window_s=10.0, lag_s=30.0)
    sm = AnimalSmoother("cow", params)
    post = np.random.default_rng(3).dirichlet(np.ones(5), size=50)
    out = run(sm, post, t0=1000.0)
    out += sm.push(NoDataHop("cow", 1000.0 + HOP * 50, 3 * HOP))
    out += run(sm, post[:10], t0=1000.0 + HOP * 53)
    out += sm.flush()
    assert out[0].t == 1000.0 + (10.0 - HOP) / 2  # a 10 s window decides its central 5 s hop
    for prev, nxt in zip(out, out[1:], strict=False):
        assert math.isclose(prev.t + prev.duration_s, nxt.t)
    assert sum(d.duration_s for d in out) == pytest.approx(63 * HOP)
    assert out[50].behaviour == NO_DATA and out[50].duration_s == 3 * HOP  # one bridged step


def test_nan_zero_and_malformed_posteriors() -> None:
    a = default_transitions(5, HOP)
    sm = AnimalSmoother("cow", HmmParams.build(CLASSES, a, HOP, lag_s=0.0))
    good = np.array([0.05, 0.05, 0.8, 0.05, 0.05])
    zeros_but_one = np.array([0.0, 0.0, 0.0, 1.0, 0.0])  # hard zeros must not crash the log
    items = [
        good,
        np.array([np.nan, 0.2, 0.2, 0.3, 0.3]),
        np.zeros(5),
        np.array([0.5, 0.5]),  # wrong length
        np.array([-0.1, 0.3, 0.3, 0.3, 0.2]),
        np.array([np.inf, 0, 0, 0, 0]),
    ] + [zeros_but_one] * 30
    out = []
    for i, p in enumerate(items):
        out.extend(sm.push(Posteriors("cow", HOP * i, p)))
    out += sm.flush()
    assert sm.bad == 5
    assert [d.behaviour for d in out[1:6]] == [NO_DATA] * 5
    assert out[0].behaviour == "ruminating"
    assert out[-1].behaviour == "resting"  # a class with zero posterior earlier stays reachable
    assert all(0.0 <= d.confidence <= 1.0 for d in out)
    assert all(math.isfinite(d.confidence) for d in out)


def test_out_of_order_and_duplicate_windows_are_dropped() -> None:
    sm = AnimalSmoother("cow", HmmParams.build(CLASSES, None, HOP, lag_s=10.0))
    p = np.array([0.1, 0.1, 0.6, 0.1, 0.1])
    out = []
    for t in (0.0, 5.0, 10.0, 10.0, 5.0, -100.0, 15.0, 12.0, 20.0):
        out.extend(sm.push(Posteriors("cow", t, p)))
    out += sm.flush()
    assert sm.dropped == 4
    assert [d.t for d in out] == [0.0, 5.0, 10.0, 15.0, 20.0]


def test_long_silence_breaks_chain_in_one_decision() -> None:
    params = HmmParams.build(CLASSES, None, HOP, lag_s=60.0, bridge_s=60.0)
    sm = AnimalSmoother("cow", params)
    p = np.array([0.1, 0.1, 0.1, 0.6, 0.1])
    out = run(sm, np.tile(p, (20, 1)))
    assert sm.pending == params.lag
    three_days = 3 * 86400.0
    start = time.perf_counter()
    out += sm.push(NoDataHop("cow", HOP * 20, three_days))
    assert time.perf_counter() - start < 0.5  # no hop-by-hop loop over a long silence
    assert sm.pending == 0  # the chain broke: everything before it is decided
    assert out[-1].behaviour == NO_DATA and out[-1].duration_s == three_days
    assert [d.behaviour for d in out[:-1]] == ["resting"] * 20
    # A silent jump forward (no NoDataHop sent) is the same no-data rule.
    later = HOP * 20 + three_days + 7 * 86400.0
    out2 = sm.push(Posteriors("cow", later, p))
    assert len(out2) == 1 and out2[0].behaviour == NO_DATA
    assert out2[0].duration_s == pytest.approx(7 * 86400.0)


def test_short_gap_is_bridged_inside_the_chain() -> None:
    # A clear 'walking' on both sides of a 20 s gap: bridged, so one chain continues.
    params = HmmParams.build(CLASSES, None, HOP, lag_s=60.0, bridge_s=60.0)
    sm = AnimalSmoother("cow", params)
    p = np.array([0.05, 0.05, 0.05, 0.05, 0.8])
    run(sm, np.tile(p, (5, 1)))
    sm.push(NoDataHop("cow", 25.0, 20.0))
    run(sm, np.tile(p, (5, 1)), t0=45.0)
    assert sm.pending == 11  # 5 + one bridged gap step + 5, nothing flushed
    out = sm.flush()
    assert [d.behaviour for d in out] == ["walking"] * 5 + [NO_DATA] + ["walking"] * 5
    assert out[5].duration_s == 20.0


def test_snapshot_restore_continues_identically() -> None:
    _, a, _, _, post = gaussian_case(11, 300, spread=1.4)
    params = HmmParams.build(CLASSES, a, HOP, lag_s=40.0, bridge_s=30.0)
    whole = AnimalSmoother("cow", params)
    ref = run(whole, post[:150])
    ref += whole.push(NoDataHop("cow", 150 * HOP, 2 * HOP))
    ref += run(whole, post[152:], t0=152 * HOP) + whole.flush()

    first = AnimalSmoother("cow", params)
    got = run(first, post[:150])
    got += first.push(NoDataHop("cow", 150 * HOP, 2 * HOP))
    state = json.loads(json.dumps(first.snapshot()))  # survives the store's JSON column
    second = AnimalSmoother("cow", params)
    second.restore(state)
    got += run(second, post[152:], t0=152 * HOP) + second.flush()
    assert [(d.t, d.behaviour) for d in got] == [(d.t, d.behaviour) for d in ref]
    assert [d.confidence for d in got] == pytest.approx([d.confidence for d in ref])


def test_light_snapshot_resumes_after_last_decided_hop() -> None:
    params = HmmParams.build(CLASSES, None, HOP, lag_s=20.0)
    sm = AnimalSmoother("cow", params)
    out = run(sm, np.tile([0.1, 0.1, 0.1, 0.1, 0.6], (10, 1)))
    state = sm.snapshot(full=False)
    decided_end = out[-1].t + out[-1].duration_s
    assert state == {"next_t": decided_end}
    fresh = AnimalSmoother("cow", params)
    fresh.restore(state)
    # Windows after a crash resume later; the undecided lag in between is reported as no data.
    later = fresh.push(Posteriors("cow", 100.0, np.array([0.1, 0.1, 0.1, 0.1, 0.6])))
    assert later[0].behaviour == NO_DATA and later[0].t == decided_end


@pytest.mark.parametrize(
    "state",
    [
        {"next_t": "x"},
        {"next_t": 1.0, "delta": "AAAA", "alpha": None},
        {"next_t": 1.0, "delta": None, "alpha": None, "steps": [[0, 5, 0, 0, None, None, 1, None]]},
        {"steps": "garbage"},
        {"next_t": 1.0, "delta": "!!notbase64", "alpha": "x"},
    ],
)
def test_restore_refuses_bad_state(state) -> None:
    sm = AnimalSmoother("cow", HmmParams.build(CLASSES, None, HOP))
    with pytest.raises(ValueError, match="cow"):
        sm.restore(state)
    assert sm.pending == 0


def hostile_stream(animal: str, rng: np.random.Generator, post: np.ndarray) -> list:
    """Windows with gaps, no-data hops, NaN rows, duplicates and late windows mixed in."""
    items, t = [], 0.0
    for p in post:
        r = rng.random()
        if r < 0.03:
            items.append(NoDataHop(animal, t, HOP * int(rng.integers(1, 30))))
            t = items[-1].t + items[-1].duration_s
            continue
        if r < 0.05:
            t += HOP * int(rng.integers(1, 40))  # a silent jump forward
        q = np.full(5, np.nan) if r > 0.98 else p
        items.append(Posteriors(animal, t, q))
        if r > 0.96:
            items.append(Posteriors(animal, t - HOP * int(rng.integers(0, 3)), p))  # late/dup
        t += HOP
    return items


def test_bank_interleaved_equals_separate() -> None:
    # The batch path (many animals per numpy call) must decide exactly as one animal alone.
    rng = np.random.default_rng(5)
    _, a, _, _, post = gaussian_case(5, 400)
    params = HmmParams.build(CLASSES, a, HOP, lag_s=30.0, bridge_s=60.0)
    streams = {
        f"cow{k}": hostile_stream(f"cow{k}", rng, post[rng.permutation(400)]) for k in range(6)
    }
    bank = SmootherBank(params, capacity=2)  # grows while it goes
    mixed = []
    pos = dict.fromkeys(streams, 0)
    while any(pos[k] < len(v) for k, v in streams.items()):
        batch = []
        for k, v in streams.items():  # uneven batches: 0-3 items per animal per call
            n = int(rng.integers(0, 4))
            batch += v[pos[k] : pos[k] + n]
            pos[k] += n
        mixed += bank.push_many(batch)
    mixed += bank.flush_all()
    for animal, items in streams.items():
        alone = AnimalSmoother(animal, params)
        ref = [d for it in items for d in alone.push(it)] + alone.flush()
        mine = [d for d in mixed if d.animal == animal]
        assert [(d.t, d.duration_s, d.behaviour) for d in mine] == [
            (d.t, d.duration_s, d.behaviour) for d in ref
        ]
        assert [d.confidence for d in mine] == pytest.approx([d.confidence for d in ref])
        assert bank.handles[animal].dropped == alone.dropped > 0
        assert bank.handles[animal].bad == alone.bad


def test_new_parameters_keep_pending_hops() -> None:
    # A reloaded model brings a new matrix and lag: nothing pending is lost or repeated.
    _, a, _, _, post = gaussian_case(9, 200)
    bank = SmootherBank(HmmParams.build(CLASSES, a, HOP, lag_s=60.0))
    out = bank.push_many(Posteriors("cow", HOP * i, p) for i, p in enumerate(post[:100]))
    assert bank.handles["cow"].pending == 12
    bank.set_params(
        HmmParams.build(CLASSES, sticky_matrix(np.random.default_rng(1)), HOP, lag_s=20.0)
    )
    assert bank.handles["cow"].pending == 12
    out += bank.push_many(Posteriors("cow", HOP * i, p) for i, p in enumerate(post[100:], 100))
    assert bank.handles["cow"].pending == 4
    out += bank.flush_all()
    assert [d.t for d in out] == [HOP * i for i in range(200)]
    with pytest.raises(ValueError, match="keep the classes"):
        bank.set_params(HmmParams.build(("a", "b"), None, HOP))


def test_prior_division_undoes_the_classifier_prior() -> None:
    # Two classes, a flat chain: with posteriors p = lik * prior / Z, the decoded path must
    # follow the likelihood alone once the prior is divided out (Bayes' rule).
    prior = np.array([0.9, 0.1])
    lik = np.array([0.3, 0.7])  # the window favours class 1 on its own
    post = lik * prior / (lik * prior).sum()  # the classifier's posterior favours class 0
    flat = np.full((2, 2), 0.5)
    with_prior = AnimalSmoother("c", HmmParams.build(("x", "y"), flat, HOP, lag_s=0, prior=prior))
    uniform = AnimalSmoother("c", HmmParams.build(("x", "y"), flat, HOP, lag_s=0, prior=[1, 1]))
    assert with_prior.push(Posteriors("c", 0.0, post))[0].behaviour == "y"
    assert uniform.push(Posteriors("c", 0.0, post))[0].behaviour == "x"


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"hop_s": 0.0}, "hop_s"),
        ({"hop_s": float("nan")}, "hop_s"),
        ({"window_s": 1.0}, "window_s"),
        ({"lag_s": -1.0}, "lag_s"),
        ({"bridge_s": float("inf")}, "bridge_s"),
        ({"transitions": np.ones((5, 5))}, "sum to 1"),
        ({"transitions": np.eye(4)}, "5x5"),
        ({"prior": [1, 1, 1, 1, 0]}, "prior"),
    ],
)
def test_params_refuse_bad_values(kwargs, match) -> None:
    args = {"transitions": None, "hop_s": HOP} | kwargs
    with pytest.raises(ValueError, match=match):
        HmmParams.build(CLASSES, args.pop("transitions"), args.pop("hop_s"), **args)


def test_stationary_distribution_matches_eigenvector() -> None:
    # Reference: numpy's eigen-decomposition (left eigenvector for eigenvalue 1).
    a = sticky_matrix(np.random.default_rng(2))
    w, v = np.linalg.eig(a.T)
    ref = np.real(v[:, np.argmin(abs(w - 1))])
    np.testing.assert_allclose(stationary_distribution(a), ref / ref.sum(), atol=1e-9)


def test_restore_from_a_longer_lag_grows_the_ring_and_catches_up() -> None:
    post = np.random.default_rng(0).dirichlet(np.ones(5), size=300)
    long_lag = SmootherBank(HmmParams.build(CLASSES, None, HOP, lag_s=500.0))
    out = long_lag.push_many(Posteriors("x", HOP * i, p) for i, p in enumerate(post[:150]))
    state = json.loads(json.dumps(long_lag.handles["x"].snapshot()))
    bank = SmootherBank(HmmParams.build(CLASSES, None, HOP, lag_s=60.0), capacity=1)
    others = [Posteriors(f"o{k}", HOP * i, post[i]) for i in range(20) for k in range(3)]
    before = bank.push_many(others)
    bank.get("x").restore(state)
    assert bank.get("x").pending == 100
    out += bank.push_many(Posteriors("x", HOP * i, p) for i, p in enumerate(post[150:], 150))
    assert bank.get("x").pending == 12  # the surplus was decided with the next window
    rest = bank.flush_all()
    out += [d for d in rest if d.animal == "x"]
    assert [d.t for d in out] == [HOP * i for i in range(300)]
    # The other animals' pending hops survived the ring's growth.
    ref = SmootherBank(HmmParams.build(CLASSES, None, HOP, lag_s=60.0))
    expect = ref.push_many(others) + ref.flush_all()
    got = before + [d for d in rest if d.animal != "x"]
    assert sorted((d.animal, d.t, d.behaviour) for d in got) == sorted(
        (d.animal, d.t, d.behaviour) for d in expect
    )
