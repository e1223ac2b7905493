"""Training pipeline: metrics, ONNX composition, grouped CV, BasicMotions, the commands."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from recdir import T0, write_recording_dir
from sklearn import metrics as skm
from typer.testing import CliRunner

from gateway.cli import app
from gateway.errors import ConfigError, DataError
from gateway.evaluation import majority_baseline, render_markdown, report_paths, score
from gateway.features import FeatureExtractor
from gateway.model import check_contract
from gateway.train import (
    FeatureTable,
    TrainConfig,
    estimate_transitions,
    train_from_recordings,
    train_on_windows,
)
from gateway.types import BEHAVIOURS

runner = CliRunner()


def test_scores_match_sklearn_metrics() -> None:
    rng = np.random.default_rng(0)
    y = rng.integers(0, 5, 500)
    p = np.where(rng.random(500) < 0.7, y, rng.integers(0, 5, 500))
    p[p == 4] = 3  # class 4 is never predicted: precision 0 by convention
    s = score(y, p, BEHAVIOURS)
    # scikit-learn metrics as the reference (zero_division=0)
    assert np.array_equal(s.confusion, skm.confusion_matrix(y, p, labels=range(5)))
    pr, rc, f1, sup = skm.precision_recall_fscore_support(y, p, labels=range(5), zero_division=0)
    assert np.allclose(s.precision, pr) and np.allclose(s.recall, rc)
    assert np.allclose(s.f1, f1) and np.array_equal(s.support, sup)
    assert s.macro_f1 == pytest.approx(skm.f1_score(y, p, average="macro", zero_division=0))
    assert s.accuracy == pytest.approx(skm.accuracy_score(y, p))
    base = majority_baseline(y[:300], 200)
    assert (base == np.bincount(y[:300]).argmax()).all()


def _table(n_animals: int = 6, per: int = 60, seed: int = 0) -> FeatureTable:
    """Windows whose class shows in their signal, from the plumbing generator's tones."""
    from recdir import signal

    rng = np.random.default_rng(seed)
    xs, ys, an = [], [], []
    for a in range(n_animals):
        roll = rng.uniform(-np.pi, np.pi)
        for i in range(per):
            c = i % len(BEHAVIOURS)
            xs.append(signal(BEHAVIOURS[c], 100, 10.0, rng, roll).T)
            ys.append(c)
            an.append(f"cow-{a}")
    x = np.stack(xs).astype(np.float32)
    cfg = TrainConfig()
    X = FeatureExtractor(cfg.feature_spec())(x)
    animal = np.array(an, dtype=object)
    return FeatureTable(X, np.array(ys), animal, animal.copy(), np.tile(np.arange(per), n_animals))


@pytest.mark.parametrize("classifier", ["forest", "mlp"])
def test_onnx_probabilities_match_predict_proba(classifier: str) -> None:
    table = _table()
    cfg = TrainConfig(classifier=classifier, folds=0, trees=20)
    result = train_on_windows(table, cfg)
    from recdir import signal

    rng = np.random.default_rng(9)
    x = np.stack([signal(BEHAVIOURS[i % 5], 100, 10.0, rng, 0.3).T for i in range(50)])
    x = x.astype(np.float32)
    model = check_contract(result.onnx_bytes)
    p_onnx = model.predict(x)
    # the training library's own predict_proba on the same features (scikit-learn)
    p_ref = result.estimator.predict_proba(FeatureExtractor(result.spec)(x))
    assert np.abs(p_onnx - p_ref).max() <= 1e-5
    assert np.allclose(p_onnx.sum(axis=1), 1.0, atol=1e-5)
    assert model.classes == BEHAVIOURS and model.window_len == 100 and model.hop_s == 5.0


def test_basicmotions_accuracy_through_the_same_pipeline() -> None:
    # BasicMotions, UEA multivariate archive, shipped in the aeon wheel
    # (aeon/datasets/data/BasicMotions): 10 Hz, 10 s series, accelerometer = channels 0-2.
    # Published classifiers reach ~1.0 with all six channels (Ruiz et al. 2021, from memory);
    # the issue asks >= 0.90 with the accelerometer alone, window = series.
    from aeon.datasets import load_basic_motions

    xtr, ytr = load_basic_motions(split="train")
    xte, yte = load_basic_motions(split="test")
    classes = tuple(sorted(set(ytr)))
    idx = {c: i for i, c in enumerate(classes)}
    cfg = TrainConfig(
        rate_hz=10.0, window_s=10.0, hop_s=10.0, classes=classes, folds=5, trees=100, min_leaf=1
    )
    x = xtr[:, :3].astype(np.float32)
    series = np.array([f"series-{i}" for i in range(len(x))], dtype=object)
    table = FeatureTable(
        FeatureExtractor(cfg.feature_spec())(x),
        np.array([idx[c] for c in ytr]),
        series,
        series.copy(),
        np.zeros(len(x), dtype=np.int64),
    )
    result = train_on_windows(table, cfg)
    model = check_contract(result.onnx_bytes)
    pred = model.predict(xte[:, :3].astype(np.float32)).argmax(axis=1)
    accuracy = float((pred == np.array([idx[c] for c in yte])).mean())
    assert accuracy >= 0.90
    assert model.transitions is None  # single windows carry no sequence
    assert result.report["cross_validation"]["macro_f1"] >= 0.85


def test_transitions_are_counted_per_hop() -> None:
    y = np.array([0, 0, 0, 1, 1, 0, 0, 1])
    k = np.array([0, 1, 2, 3, 4, 10, 11, 12])  # a hole between hop 4 and hop 10
    animal = np.array(["a"] * 8, dtype=object)
    m = estimate_transitions(y, animal, animal.copy(), k, 2)
    # pairs: 0-0 x3, 0-1 x2, 1-1 x1 (the 1->0 across the hole does not count); +1 each cell
    assert np.allclose(m, [[4 / 7, 3 / 7], [1 / 3, 2 / 3]])
    assert estimate_transitions(y[:1], animal[:1], animal[:1], k[:1], 2) is None


def test_grouped_cv_does_not_learn_animals() -> None:
    # Each animal does one behaviour only and has its own signature: a split by window
    # would memorise the animal and score ~1, a split by animal cannot.
    rng = np.random.default_rng(1)
    n_animals, per = 10, 40
    X = np.repeat(rng.normal(0, 5, (n_animals, 8)), per, axis=0)
    X += rng.normal(0, 0.1, X.shape)
    y = np.repeat(np.arange(n_animals) % 2, per)
    animal = np.repeat(np.array([f"a{i}" for i in range(n_animals)], dtype=object), per)
    table = FeatureTable(X.astype(np.float32), y, animal, animal.copy(), np.zeros(y.size, int))
    from gateway.train import grouped_cross_validation

    cfg = TrainConfig(classes=("a", "b"), trees=20)
    pred, _, folds = grouped_cross_validation(table, cfg)
    assert folds == 5 and pred.size == y.size
    assert (pred == y).mean() < 0.85


def test_train_and_evaluate_commands_end_to_end(tmp_path: Path) -> None:
    train_dir = write_recording_dir(tmp_path / "train", animals=4, bouts=10, seed=1)
    held_dir = write_recording_dir(tmp_path / "held", animals=2, bouts=10, seed=2, fmt="raw")
    out = tmp_path / "models" / "herd.onnx"
    r = runner.invoke(
        app,
        ["train", str(train_dir), "--holdout", str(held_dir), "--out", str(out), "--trees", "15"],
    )
    assert r.exit_code == 0, r.output
    assert "held-out animals: macro-F1" in r.output
    paths = report_paths(out)
    report = json.loads(paths["json"].read_text())
    assert report["cross_validation"]["folds"] == 4 and report["data"]["animals"] == 4
    assert report["data"]["dropped"]["mixed behaviours"] > 0
    assert "Majority-class baseline" in paths["md"].read_text()
    assert paths["png"].stat().st_size > 1000
    model = check_contract(out.read_bytes())
    assert model.card["holdout"]["animals"] == 2
    assert model.card["command"].startswith("boutline train train --holdout held")
    assert model.transitions is not None and model.transitions.shape == (5, 5)

    r = runner.invoke(app, ["evaluate", str(out), str(held_dir), "--out", str(tmp_path / "ev")])
    assert r.exit_code == 0, r.output
    ev = json.loads((tmp_path / "ev.report.json").read_text())
    assert ev["evaluation"]["confusion"] == report["holdout"]["confusion"]
    assert "Confusion matrix" in r.output

    r = runner.invoke(app, ["model", "info", str(out)])
    assert r.exit_code == 0 and "classes: grazing, feeding" in r.output
    assert "held-out animals" in r.output


def test_training_refuses_unusable_data(tmp_path: Path) -> None:
    root = write_recording_dir(tmp_path / "r", animals=2, bouts=4)
    with (root / "observations.csv").open("a") as f:
        f.write(f"cow-0,C000,{T0 + 1},{T0 + 2},drinking\n")
    with pytest.raises(DataError, match=r"drinking \(1 intervals\).*--classes"):
        train_from_recordings(root, TrainConfig(trees=5))
    only4 = write_recording_dir(tmp_path / "r4", animals=2, bouts=4, behaviours=BEHAVIOURS[:4])
    with pytest.raises(DataError, match="no labelled windows for class.*walking"):
        train_from_recordings(only4, TrainConfig(trees=5, folds=0))
    one = write_recording_dir(tmp_path / "one", animals=1, bouts=5)
    with pytest.raises(DataError, match="at least 2 animals"):
        train_from_recordings(one, TrainConfig(trees=5))
    r = runner.invoke(app, ["train", str(tmp_path / "nothing"), "--out", str(tmp_path / "m.onnx")])
    assert r.exit_code != 0


def test_bad_settings_are_refused() -> None:
    with pytest.raises(ConfigError, match="whole numbers of samples"):
        TrainConfig(rate_hz=10.0, window_s=10.05)
    with pytest.raises(ConfigError, match="classifier"):
        TrainConfig(classifier="boosting")
    with pytest.raises(ConfigError, match="folds"):
        TrainConfig(folds=1)


def test_evaluation_report_renders_drops_and_baseline() -> None:
    s = score([0, 1, 1], [0, 1, 0], ["resting", "walking"])
    md = render_markdown(
        {
            "title": "Evaluation report",
            "classes": ["resting", "walking"],
            "data": {"animals": 1, "collars": 1, "windows_labelled": 3, "dropped": {"gap": 2}},
            "sections": [["evaluation", "Scores", "baseline"]],
            "evaluation": s.to_json(),
            "baseline": {"class": "walking", "accuracy": 0.667, "macro_f1": 0.4},
        }
    )
    assert "- gap: 2" in md and "always `walking`" in md and "| walking | 1.000 | 0.500" in md
