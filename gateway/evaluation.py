"""Scoring a classifier honestly: per-class metrics, confusion matrix, baseline, reports.

Metrics follow the usual definitions (as scikit-learn computes them, zero_division=0):
precision = TP / (TP + FP), recall = TP / (TP + FN), F1 their harmonic mean, macro-F1 the
unweighted mean over classes. The confusion matrix has true classes in rows.

>>> s = score([0, 0, 1, 1], [0, 1, 1, 1], ["resting", "walking"])
>>> round(s.macro_f1, 3), s.confusion.tolist()
(0.733, [[1, 1], [0, 2]])
"""

from __future__ import annotations

import json
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

__all__ = [
    "Scores",
    "confusion_matrix",
    "data_summary",
    "evaluate_on_recordings",
    "baseline_json",
    "majority_baseline",
    "render_markdown",
    "report_paths",
    "score",
    "write_report",
]


def confusion_matrix(y_true: Sequence[int], y_pred: Sequence[int], n_classes: int) -> np.ndarray:
    """Counts [C, C]: row = true class, column = predicted class."""
    t = np.asarray(y_true, dtype=np.int64)
    p = np.asarray(y_pred, dtype=np.int64)
    if t.shape != p.shape:
        raise ValueError("y_true and y_pred must have the same length")
    if t.size and (min(t.min(), p.min()) < 0 or max(t.max(), p.max()) >= n_classes):
        raise ValueError(f"class indices must lie in 0..{n_classes - 1}")
    return np.bincount(t * n_classes + p, minlength=n_classes * n_classes).reshape(
        n_classes, n_classes
    )


def _ratio(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return np.divide(a, b, out=np.zeros_like(a, dtype=np.float64), where=b > 0)


@dataclass(frozen=True, slots=True)
class Scores:
    """Per-class and overall scores from one confusion matrix."""

    classes: tuple[str, ...]
    confusion: np.ndarray

    @property
    def support(self) -> np.ndarray:
        return self.confusion.sum(axis=1)

    @property
    def precision(self) -> np.ndarray:
        return _ratio(np.diag(self.confusion).astype(float), self.confusion.sum(axis=0))

    @property
    def recall(self) -> np.ndarray:
        return _ratio(np.diag(self.confusion).astype(float), self.support)

    @property
    def f1(self) -> np.ndarray:
        p, r = self.precision, self.recall
        return _ratio(2 * p * r, p + r)

    @property
    def macro_f1(self) -> float:
        return float(self.f1.mean())

    @property
    def accuracy(self) -> float:
        n = self.confusion.sum()
        return float(np.trace(self.confusion) / n) if n else 0.0

    def to_json(self) -> dict[str, Any]:
        return {
            "accuracy": round(self.accuracy, 4),
            "macro_f1": round(self.macro_f1, 4),
            "per_class": {
                c: {
                    "precision": round(float(self.precision[i]), 4),
                    "recall": round(float(self.recall[i]), 4),
                    "f1": round(float(self.f1[i]), 4),
                    "support": int(self.support[i]),
                }
                for i, c in enumerate(self.classes)
            },
            "confusion": self.confusion.astype(int).tolist(),
        }


def score(y_true: Sequence[int], y_pred: Sequence[int], classes: Sequence[str]) -> Scores:
    """Scores of predictions against truth (class indices into ``classes``)."""
    return Scores(tuple(classes), confusion_matrix(y_true, y_pred, len(classes)))


def majority_baseline(y_train: Sequence[int], n_test: int) -> np.ndarray:
    """Predictions of the majority-class baseline: the commonest training class, always."""
    counts = np.bincount(np.asarray(y_train, dtype=np.int64))
    return np.full(n_test, int(counts.argmax()), dtype=np.int64)


def _confusion_text(s: Scores) -> str:
    width = max(9, *(len(c) for c in s.classes)) + 1
    head = "true \\ pred".ljust(width) + "".join(c[:width].rjust(width) for c in s.classes)
    rows = [head]
    for i, c in enumerate(s.classes):
        rows.append(c.ljust(width) + "".join(str(v).rjust(width) for v in s.confusion[i]))
    return "\n".join(rows)


def _scores_md(title: str, sj: dict[str, Any], classes: Sequence[str]) -> list[str]:
    s = Scores(tuple(classes), np.asarray(sj["confusion"]))
    lines = [
        f"### {title}",
        "",
        f"accuracy {sj['accuracy']:.3f}, macro-F1 **{sj['macro_f1']:.3f}**",
        "",
        "| class | precision | recall | F1 | windows |",
        "|---|---:|---:|---:|---:|",
    ]
    for c in classes:
        r = sj["per_class"][c]
        lines.append(
            f"| {c} | {r['precision']:.3f} | {r['recall']:.3f} | {r['f1']:.3f} | {r['support']} |"
        )
    lines += ["", "Confusion matrix (rows: observed, columns: predicted):", "", "```"]
    lines += [_confusion_text(s), "```", ""]
    return lines


def render_markdown(report: dict[str, Any]) -> str:
    """The Markdown form of a training or evaluation report."""
    classes = report["classes"]
    lines = [f"# {report['title']}", ""]
    if report.get("notice"):
        lines += [f"> {report['notice']}", ""]
    for key, label in (("model", "Model"), ("command", "Command"), ("recordings", "Recordings")):
        if report.get(key):
            lines.append(f"- {label}: `{report[key]}`")
    data = report.get("data", {})
    if data:
        lines.append(
            f"- Data: {data.get('animals', '?')} animals, {data.get('collars', '?')} collars,"
            f" {data.get('windows_labelled', 0)} labelled windows"
        )
        lines += ["", "Windows per class:", ""]
        lines += [f"- {c}: {n}" for c, n in data.get("windows_per_class", {}).items()]
        dropped = data.get("dropped", {})
        lines += ["", "Dropped or skipped (reason: count):", ""]
        lines += [f"- {k}: {v}" for k, v in dropped.items()] or ["- none"]
    lines.append("")
    for key, title, *base_key in report.get("sections", []):
        if key not in report:
            continue
        lines += _scores_md(title, report[key], classes)
        b = report.get(base_key[0]) if base_key else None
        if b:
            lines += [
                f"Majority-class baseline: always `{b['class']}`, accuracy {b['accuracy']:.3f},"
                f" macro-F1 {b['macro_f1']:.3f}",
                "",
            ]
    return "\n".join(lines).rstrip() + "\n"


def report_paths(prefix: str | Path) -> dict[str, Path]:
    """Where a report goes: ``<prefix>.report.md``, ``.report.json``, ``.confusion.png``."""
    p = Path(prefix)
    base = p.with_suffix("") if p.suffix == ".onnx" else p
    return {
        "md": base.with_name(base.name + ".report.md"),
        "json": base.with_name(base.name + ".report.json"),
        "png": base.with_name(base.name + ".confusion.png"),
    }


def _plot_confusion(s: Scores, title: str, path: Path) -> bool:
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        return False
    cm = s.confusion.astype(float)
    rows = np.maximum(cm.sum(axis=1, keepdims=True), 1)
    fig, ax = plt.subplots(figsize=(5.5, 4.8), dpi=100)
    im = ax.imshow(cm / rows, cmap="Blues", vmin=0, vmax=1)
    n = len(s.classes)
    ax.set_xticks(range(n), s.classes, rotation=35, ha="right")
    ax.set_yticks(range(n), s.classes)
    for i in range(n):
        for j in range(n):
            v = cm[i, j] / rows[i, 0]
            ax.text(
                j,
                i,
                f"{int(cm[i, j])}",
                ha="center",
                va="center",
                color="white" if v > 0.5 else "black",
                fontsize=8,
            )
    ax.set_xlabel("predicted")
    ax.set_ylabel("observed")
    ax.set_title(title, fontsize=10)
    fig.colorbar(im, ax=ax, fraction=0.046, label="share of observed row")
    fig.tight_layout()
    fig.savefig(path, metadata={"Software": None})
    plt.close(fig)
    return True


def write_report(report: dict[str, Any], prefix: str | Path) -> list[Path]:
    """Write the report as Markdown and JSON (and the confusion PNG when matplotlib is there)."""
    paths = report_paths(prefix)
    paths["md"].parent.mkdir(parents=True, exist_ok=True)
    paths["json"].write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    paths["md"].write_text(render_markdown(report), encoding="utf-8")
    written = [paths["md"], paths["json"]]
    key, title, *_ = (report.get("sections") or [(None, "")])[-1]
    if key and key in report:
        s = Scores(tuple(report["classes"]), np.asarray(report[key]["confusion"]))
        if _plot_confusion(s, title, paths["png"]):
            written.append(paths["png"])
    return written


def data_summary(
    n_animals: int, n_collars: int, y: np.ndarray, classes: Sequence[str], dropped: Counter[str]
) -> dict[str, Any]:
    """The "data" section of a report: what was used and what was left out, and why."""
    per_class = np.bincount(np.asarray(y, dtype=np.int64), minlength=len(classes))
    return {
        "animals": int(n_animals),
        "collars": int(n_collars),
        "windows_labelled": int(per_class.sum()),
        "windows_per_class": {c: int(per_class[i]) for i, c in enumerate(classes)},
        "dropped": {k: int(v) for k, v in sorted(dropped.items()) if v},
    }


def evaluate_on_recordings(
    model: Any,
    path: str | Path,
    *,
    min_share: float | None = None,
    progress: Callable[[str], None] | None = None,
) -> dict[str, Any]:
    """Score a loaded model (``gateway.model.Model``) on a labelled recording directory.

    Windows are cut with the model's own rate, length and hop; behaviours the model does not
    know are skipped and counted.
    """
    from .errors import DataError
    from .labelling import DEFAULT_MIN_SHARE, iter_labelled_windows
    from .recordings import open_recordings

    recs = open_recordings(path)
    counts: Counter[str] = Counter(recs.counts)
    y_true: list[np.ndarray] = []
    y_pred: list[np.ndarray] = []
    animals: set[str] = set()
    collars = 0
    for chunk in iter_labelled_windows(
        recs,
        classes=model.classes,
        rate_hz=model.sample_rate_hz,
        window_len=model.window_len,
        hop_len=model.hop_len,
        min_share=DEFAULT_MIN_SHARE if min_share is None else min_share,
        counts=counts,
        progress=progress,
    ):
        p = model.predict(chunk.x)
        y_true.append(chunk.y)
        y_pred.append(p.argmax(axis=1))
        animals.update(chunk.animal.tolist())
        collars += 1
    if not y_true:
        raise DataError(
            f"{path}: no window could be labelled with the model's classes"
            f" ({', '.join(f'{k}: {v}' for k, v in counts.items() if v)})"
        )
    yt, yp = np.concatenate(y_true), np.concatenate(y_pred)
    s = score(yt, yp, model.classes)
    base = score(yt, majority_baseline(yt, yt.size), model.classes)
    return {
        "title": "Evaluation report",
        "model": str(model.source),
        "recordings": str(path),
        "classes": list(model.classes),
        "data": data_summary(len(animals), collars, yt, model.classes, counts)
        | {"meta": dict(recs.meta)},
        "sections": [["evaluation", "Scores on these recordings", "baseline"]],
        "evaluation": s.to_json(),
        "baseline": baseline_json(base, yt),
    }


def baseline_json(base: Scores, y_train: np.ndarray) -> dict[str, Any]:
    """The report's baseline entry for majority-class predictions scored as ``base``."""
    cls = base.classes[int(np.bincount(np.asarray(y_train, dtype=np.int64)).argmax())]
    return {"class": cls, "accuracy": round(base.accuracy, 4), "macro_f1": round(base.macro_f1, 4)}
