"""Training: labelled windows -> features (the ONNX feature graph) -> classifier -> one ONNX file.

Steps, each a function so the CLI, the tests and the BasicMotions check share them:

1. :func:`collect` cuts labelled windows from a recording directory (gateway.labelling) and
   turns them into a feature table by running the feature graph in onnxruntime, one collar
   at a time.
2. :func:`grouped_cross_validation` scores the classifier with folds grouped by animal, so no
   window of a test animal is ever in its training fold, against a majority-class baseline.
3. :func:`fit_classifier` fits the final classifier (random forest by default, or an MLP
   behind a standard scaler) on every window.
4. :func:`compose_model` appends the classifier (skl2onnx) to the feature graph, giving one
   graph from raw windows in g to ``probabilities``, with the contract's metadata: classes,
   rate, window, hop, the per-hop transition matrix (:func:`estimate_transitions`) and the
   model card.
"""

from __future__ import annotations

import json
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .errors import ConfigError, DataError
from .features import ML_OPSET, OPSET, FeatureExtractor, FeatureSpec, build_feature_graph
from .model import (
    META_CARD,
    META_CLASSES,
    META_HOP_S,
    META_SAMPLE_RATE_HZ,
    META_TRANSITIONS,
    META_WINDOW_S,
    OUTPUT_NAME,
)
from .types import BEHAVIOURS

__all__ = [
    "FeatureTable",
    "SYNTHETIC_NOTICE",
    "TrainConfig",
    "TrainResult",
    "collect",
    "compose_model",
    "estimate_transitions",
    "fit_classifier",
    "grouped_cross_validation",
    "train_from_recordings",
    "train_on_windows",
]

SYNTHETIC_NOTICE = (
    "Trained on synthetic data from the Boutline simulator, not on real cattle. Before real"
    " use, retrain on labelled recordings from your own herd and collar placement"
    " (boutline train) and check the scores on animals the model has not seen."
)
Progress = Callable[[str], None]


@dataclass(frozen=True, slots=True)
class TrainConfig:
    """Everything that decides a trained model; recorded in its card."""

    rate_hz: float = 10.0
    window_s: float = 10.0
    hop_s: float = 5.0
    min_share: float = 0.8
    classes: tuple[str, ...] = BEHAVIOURS
    classifier: str = "forest"
    trees: int = 40
    min_leaf: int = 5  # ~2 MB; on the default herd as good as 60 trees of >= 3
    folds: int = 5
    max_windows: int = 60_000
    seed: int = 0
    jobs: int = 2
    static_s: float = 2.0
    neck_axis: int = 0

    def __post_init__(self) -> None:
        problems = []
        if not 1.0 <= self.rate_hz <= 200.0:
            problems.append(f"rate {self.rate_hz:g} Hz is outside 1..200")
        t = self.window_s * self.rate_hz
        h = self.hop_s * self.rate_hz
        if abs(t - round(t)) > 1e-6 or abs(h - round(h)) > 1e-6:
            problems.append("window and hop must be whole numbers of samples at the rate")
        if not 0 < self.hop_s <= self.window_s:
            problems.append("hop must be > 0 and no longer than the window")
        if round(t) < 8:
            problems.append("window must hold at least 8 samples")
        if not 0.5 <= self.min_share <= 1.0:
            problems.append(f"min share {self.min_share:g} must be within 0.5..1")
        if len(self.classes) < 2 or len(set(self.classes)) != len(self.classes):
            problems.append("classes must be at least two distinct names")
        if self.classifier not in ("forest", "mlp"):
            problems.append(f"classifier {self.classifier!r} must be 'forest' or 'mlp'")
        if not 1 <= self.trees <= 1000 or self.min_leaf < 1:
            problems.append("trees must be within 1..1000 and min leaf >= 1")
        if self.folds < 0 or self.folds == 1:
            problems.append("folds must be 0 (no cross-validation) or >= 2")
        if self.max_windows < 100 or self.jobs < 1:
            problems.append("max windows must be >= 100 and jobs >= 1")
        if problems:
            raise ConfigError("; ".join(problems), problems)

    @property
    def window_len(self) -> int:
        return int(round(self.window_s * self.rate_hz))

    @property
    def hop_len(self) -> int:
        return int(round(self.hop_s * self.rate_hz))

    def feature_spec(self) -> FeatureSpec:
        return FeatureSpec(
            self.rate_hz, self.window_len, static_s=self.static_s, neck_axis=self.neck_axis
        )


@dataclass(slots=True)
class FeatureTable:
    """Features of labelled windows, with what is needed to group and sequence them."""

    X: np.ndarray  # float32 [n, F]
    y: np.ndarray  # int64 [n]
    animal: np.ndarray  # object [n]
    collar: np.ndarray  # object [n]
    k: np.ndarray  # int64 [n], hop index on the collar's grid
    dropped: Counter[str] = field(default_factory=Counter)

    def __len__(self) -> int:
        return int(self.y.size)


@dataclass(slots=True)
class TrainResult:
    """A trained model: the ONNX bytes, the fitted estimator and the report behind its card."""

    onnx_bytes: bytes
    estimator: Any
    spec: FeatureSpec
    report: dict[str, Any]
    table: FeatureTable | None = None


def collect(
    recordings: Any,
    config: TrainConfig,
    extractor: FeatureExtractor | None = None,
    progress: Progress | None = None,
) -> FeatureTable:
    """Feature table of every labelled window in a RecordingSet (see gateway.recordings)."""
    from .labelling import iter_labelled_windows

    extractor = extractor or FeatureExtractor(config.feature_spec())
    counts: Counter[str] = Counter(recordings.counts)
    parts: list[tuple[np.ndarray, ...]] = []
    for chunk in iter_labelled_windows(
        recordings,
        classes=config.classes,
        rate_hz=config.rate_hz,
        window_len=config.window_len,
        hop_len=config.hop_len,
        min_share=config.min_share,
        counts=counts,
        progress=progress,
    ):
        collar = np.full(len(chunk), chunk.collar, dtype=object)
        parts.append((extractor(chunk.x), chunk.y, chunk.animal, collar, chunk.k))
    if not parts:
        raise DataError(
            f"{recordings.root}: no window could be labelled"
            f" ({', '.join(f'{k}: {v}' for k, v in counts.items() if v) or 'no data'})"
        )
    cols = [np.concatenate([p[i] for p in parts]) for i in range(5)]
    return FeatureTable(*cols, dropped=counts)


def _make_estimator(config: TrainConfig, n_classes: int) -> Any:
    if config.classifier == "mlp":
        from sklearn.neural_network import MLPClassifier
        from sklearn.pipeline import make_pipeline
        from sklearn.preprocessing import StandardScaler

        return make_pipeline(
            StandardScaler(),
            MLPClassifier(
                hidden_layer_sizes=(64, 32),
                alpha=1e-3,
                max_iter=400,
                early_stopping=True,
                random_state=config.seed,
            ),
        )
    from sklearn.ensemble import RandomForestClassifier

    # Balanced class weights: rare behaviours (walking) must keep their recall.
    return RandomForestClassifier(
        n_estimators=config.trees,
        min_samples_leaf=config.min_leaf,
        class_weight="balanced_subsample",
        n_jobs=config.jobs,
        random_state=config.seed,
    )


def _cap_per_class(y: np.ndarray, cap: int, seed: int) -> np.ndarray:
    """Indices keeping at most ``cap`` windows of each class, drawn at random (seeded)."""
    rng = np.random.default_rng(seed)
    keep = []
    for c in np.unique(y):
        idx = np.flatnonzero(y == c)
        keep.append(idx if idx.size <= cap else rng.choice(idx, cap, replace=False))
    return np.sort(np.concatenate(keep))


def fit_classifier(X: np.ndarray, y: np.ndarray, config: TrainConfig, n_classes: int) -> Any:
    """Fit the configured classifier; every class must have training windows."""
    missing = sorted(set(range(n_classes)) - set(np.unique(y).tolist()))
    if missing:
        names = ", ".join(config.classes[i] for i in missing)
        raise DataError(
            f"no labelled windows for class(es) {names}; add observations of them or leave them"
            " out with --classes"
        )
    est = _make_estimator(config, n_classes)
    if config.classifier == "mlp":
        import warnings

        from sklearn.exceptions import ConvergenceWarning

        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            est.fit(X, y)
    else:
        est.fit(X, y)
    return est


def grouped_cross_validation(
    table: FeatureTable, config: TrainConfig, progress: Progress | None = None
) -> tuple[np.ndarray, np.ndarray, int]:
    """Out-of-fold predictions for every window, with folds grouped by animal.

    Each fold fits on its training animals (capped per class like the final fit) and
    predicts every window of its test animals, so the scores keep the data's own class
    mix. Returns ``(predicted, baseline_predicted, folds)``; the baseline is the training
    fold's majority class.
    """
    from sklearn.model_selection import GroupKFold

    from .evaluation import majority_baseline

    animals = np.unique(table.animal)
    if animals.size < 2:
        raise DataError(
            "animal-grouped cross-validation needs at least 2 animals, the data has"
            f" {animals.size}; add animals or pass --folds 0"
        )
    folds = min(config.folds, int(animals.size))
    cap = config.max_windows // len(config.classes)
    X, y = table.X, table.y
    pred = np.empty(y.size, dtype=np.int64)
    base = np.empty(y.size, dtype=np.int64)
    splitter = GroupKFold(n_splits=folds, shuffle=True, random_state=config.seed)
    for i, (tr, te) in enumerate(splitter.split(X, y, table.animal)):
        if progress:
            progress(f"cross-validation fold {i + 1}/{folds}")
        fit = tr[_cap_per_class(y[tr], cap, config.seed + i)]
        # A fold may lack a class; predict() still returns true class indices (classes_).
        est = _make_estimator(config, len(config.classes))
        est.fit(X[fit], y[fit])
        pred[te] = est.predict(X[te])
        base[te] = majority_baseline(y[tr], te.size)
    return pred, base, folds


def estimate_transitions(
    y: np.ndarray, animal: np.ndarray, collar: np.ndarray, k: np.ndarray, n_classes: int
) -> np.ndarray | None:
    """Per-hop transition matrix from label sequences, rows sum to 1; None without sequences.

    Counts pairs of windows one hop apart on the same collar and animal, plus one in every
    cell (Laplace smoothing, so no transition is impossible for the smoother).
    """
    counts = np.ones((n_classes, n_classes))
    order = np.lexsort((k, animal.astype(str), collar.astype(str)))
    ys, ks, an, co = y[order], k[order], animal[order], collar[order]
    nxt = (ks[1:] == ks[:-1] + 1) & (an[1:] == an[:-1]) & (co[1:] == co[:-1])
    if not nxt.any():
        return None
    np.add.at(counts, (ys[:-1][nxt], ys[1:][nxt]), 1)
    return counts / counts.sum(axis=1, keepdims=True)


def _classifier_graph(estimator: Any, n_features: int) -> Any:
    from skl2onnx import convert_sklearn
    from skl2onnx.common.data_types import FloatTensorType

    final = estimator.steps[-1][1] if hasattr(estimator, "steps") else estimator
    return convert_sklearn(
        estimator,
        initial_types=[("features", FloatTensorType([None, n_features]))],
        options={id(final): {"zipmap": False}},
        target_opset={"": OPSET, "ai.onnx.ml": ML_OPSET},
    )


def compose_model(
    spec: FeatureSpec,
    estimator: Any,
    *,
    classes: Sequence[str],
    hop_s: float,
    transitions: np.ndarray | None,
    card: dict[str, Any],
) -> bytes:
    """One ONNX model: the feature graph, then the classifier, with the contract's metadata."""
    from onnx import checker, helper

    feat = build_feature_graph(spec)
    clf = _classifier_graph(estimator, len(spec.names))
    fg, cg = feat.graph, clf.graph
    ours = {o for n in fg.node for o in n.output} | {i.name for i in fg.initializer}
    theirs = {o for n in cg.node for o in n.output} | {i.name for i in cg.initializer}
    clash = (ours & theirs) - {"features"}
    if clash:
        raise RuntimeError(f"feature and classifier graphs share names {sorted(clash)[:5]}")
    # Keep only the nodes that lead to the probabilities (the label output is not wanted).
    nodes = list(fg.node) + list(cg.node)
    needed, kept = {OUTPUT_NAME}, []
    for n in reversed(nodes):
        if needed & set(n.output):
            kept.append(n)
            needed |= set(n.input)
    kept.reverse()
    out_info = next(o for o in cg.output if o.name == OUTPUT_NAME)
    graph = helper.make_graph(
        kept,
        "boutline_behaviour",
        list(fg.input),
        [out_info],
        initializer=list(fg.initializer) + list(cg.initializer),
    )
    opsets: dict[str, int] = {}
    for imp in list(feat.opset_import) + list(clf.opset_import):
        opsets[imp.domain] = max(opsets.get(imp.domain, 0), imp.version)
    model = helper.make_model(
        graph,
        opset_imports=[helper.make_opsetid(d, v) for d, v in sorted(opsets.items())],
        producer_name="boutline",
    )
    model.ir_version = 8
    meta = {
        META_CLASSES: json.dumps(list(classes)),
        META_SAMPLE_RATE_HZ: f"{spec.sample_rate_hz:g}",
        META_WINDOW_S: f"{spec.window_len / spec.sample_rate_hz:g}",
        META_HOP_S: f"{hop_s:g}",
        META_CARD: json.dumps(card, separators=(",", ":")),
    }
    if transitions is not None:
        meta[META_TRANSITIONS] = json.dumps(np.round(transitions, 6).tolist())
    helper.set_model_props(model, meta)
    checker.check_model(model)
    return model.SerializeToString()


def _versions() -> dict[str, str]:
    from importlib.metadata import PackageNotFoundError, version

    out = {}
    for pkg in ("boutline", "scikit-learn", "skl2onnx", "onnx", "onnxruntime", "numpy"):
        try:
            out[pkg] = version(pkg)
        except PackageNotFoundError:
            out[pkg] = "unknown"
    return out


def _card_scores(sj: dict[str, Any]) -> dict[str, Any]:
    """The card's short form of a scores section: no confusion matrix."""
    return {k: v for k, v in sj.items() if k != "confusion"}


def _config_json(config: TrainConfig) -> dict[str, Any]:
    d = asdict(config)
    d["classes"] = list(config.classes)
    return d


def train_on_windows(
    table: FeatureTable,
    config: TrainConfig,
    *,
    spec: FeatureSpec | None = None,
    report: dict[str, Any] | None = None,
    holdout: Callable[[bytes], dict[str, Any]] | None = None,
    progress: Progress | None = None,
) -> TrainResult:
    """Cross-validate (when ``config.folds``), fit on all windows and compose the ONNX model.

    ``table`` holds features computed by the feature graph of ``spec``. ``holdout``, when
    given, scores the composed model (ONNX bytes) on data kept out of training and returns
    an evaluation report; its scores join the report and the card.
    """
    from .evaluation import baseline_json, data_summary, score

    spec = spec or config.feature_spec()
    classes = list(config.classes)
    report = dict(report or {})
    report.setdefault("title", "Training report")
    report["classes"] = classes
    report.setdefault(
        "data",
        data_summary(
            np.unique(table.animal).size,
            np.unique(table.collar).size,
            table.y,
            classes,
            table.dropped,
        ),
    )
    report["sections"] = []
    if config.folds:
        pred, base, folds = grouped_cross_validation(table, config, progress)
        cv = score(table.y, pred, classes)
        report["cross_validation"] = cv.to_json() | {"folds": folds, "grouped_by": "animal"}
        report["baseline"] = baseline_json(score(table.y, base, classes), table.y)
        report["sections"].append(
            ["cross_validation", f"Cross-validation, {folds} folds grouped by animal", "baseline"]
        )
    if progress:
        progress("fitting the final classifier")
    fit_idx = _cap_per_class(table.y, config.max_windows // len(classes), config.seed)
    est = fit_classifier(table.X[fit_idx], table.y[fit_idx], config, len(classes))
    transitions = estimate_transitions(table.y, table.animal, table.collar, table.k, len(classes))
    card = {
        "name": report.get("name", "boutline behaviour model"),
        "notice": report.get("notice", ""),
        "command": report.get("command", ""),
        "trained_with": _versions(),
        "config": _config_json(config),
        "features": spec.to_json(),
        "classifier": type(est.steps[-1][1] if hasattr(est, "steps") else est).__name__,
        "data": report["data"] | {"meta": report.get("data_meta", {})},
        "transitions": None
        if transitions is None
        else "per hop, from training label sequences, +1 in every cell",
    }
    for key in ("cross_validation", "baseline"):
        if key in report:
            card[key] = _card_scores(report[key])

    def compose() -> bytes:
        return compose_model(
            spec, est, classes=classes, hop_s=config.hop_s, transitions=transitions, card=card
        )

    onnx_bytes = compose()
    if holdout is not None:
        if progress:
            progress("scoring on held-out recordings")
        held = holdout(onnx_bytes)
        report["holdout"] = held["evaluation"] | {
            "recordings": held["recordings"],
            "data": held["data"],
        }
        report["holdout_baseline"] = held["baseline"]
        report["sections"].append(
            ["holdout", "Held-out animals (other recordings)", "holdout_baseline"]
        )
        card["holdout"] = _card_scores(held["evaluation"]) | {
            "recordings": Path(held["recordings"]).name,
            "animals": held["data"]["animals"],
            "meta": held["data"].get("meta", {}),
        }
        onnx_bytes = compose()
    report["model_bytes"] = len(onnx_bytes)
    return TrainResult(onnx_bytes, est, spec, report, table)


def train_from_recordings(
    path: str | Path,
    config: TrainConfig,
    *,
    holdout: str | Path | None = None,
    command: str = "",
    progress: Progress | None = None,
) -> TrainResult:
    """Train from a labelled recording directory; optionally score on a held-out directory
    (animals the model never saw, e.g. another simulator seed)."""
    from .recordings import open_recordings

    recs = open_recordings(path)
    unknown = Counter(o.behaviour for o in recs.observations if o.behaviour not in config.classes)
    if unknown:
        names = ", ".join(f"{b} ({n} intervals)" for b, n in unknown.most_common())
        raise DataError(
            f"observations name behaviours that are not classes: {names}; add them with"
            f" --classes (now {','.join(config.classes)}) or fix the names"
        )
    if holdout is not None:
        open_recordings(holdout)  # fail on a bad held-out directory before the long work
    table = collect(recs, config, progress=progress)
    synthetic = bool(recs.meta.get("synthetic"))
    report: dict[str, Any] = {
        "title": "Training report",
        "recordings": str(path),
        "command": command,
        "notice": SYNTHETIC_NOTICE if synthetic else "",
        "data_meta": dict(recs.meta),
        "name": "boutline default (synthetic herd)" if synthetic else "boutline behaviour model",
    }

    def score_holdout(onnx_bytes: bytes) -> dict[str, Any]:
        from .evaluation import evaluate_on_recordings
        from .model import check_contract

        model = check_contract(onnx_bytes)
        return evaluate_on_recordings(model, holdout, min_share=config.min_share)

    return train_on_windows(
        table,
        config,
        report=report,
        holdout=score_holdout if holdout is not None else None,
        progress=progress,
    )
