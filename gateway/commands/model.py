"""``boutline model``: inspect a model's contract and card."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import typer

__all__ = ["app", "info"]

app = typer.Typer(
    help="Inspect a model's contract and card.\n\nExample: boutline model info models/default.onnx",
    no_args_is_help=True,
)


def _scores_line(name: str, s: dict[str, Any]) -> list[str]:
    lines = [f"  {name}: macro-F1 {s['macro_f1']:.3f}, accuracy {s['accuracy']:.3f}"]
    for c, v in s.get("per_class", {}).items():
        lines.append(
            f"    {c:<12} precision {v['precision']:.3f}  recall {v['recall']:.3f}"
            f"  F1 {v['f1']:.3f}  windows {v['support']}"
        )
    return lines


def describe(model: Any) -> str:
    """Human-readable contract and card of a loaded model (gateway.model.Model)."""
    c = model.contract
    lines = [
        f"model: {model.source}",
        f"input: accel float32 [N, 3, {c.window_len}] (raw g, collar axes x, y, z)",
        f"output: probabilities float32 [N, {len(c.classes)}], rows sum to 1",
        f"classes: {', '.join(c.classes)}",
        f"sample rate: {c.sample_rate_hz:g} Hz, window {c.window_s:g} s, hop {c.hop_s:g} s",
    ]
    if c.transitions is None:
        lines.append("transitions: none (smoothing falls back to its own default)")
    else:
        lines.append("transitions per hop (rows: from, columns: to):")
        w = max(len(n) for n in c.classes) + 2
        lines.append(" " * w + "".join(n[:10].rjust(11) for n in c.classes))
        for name, row in zip(c.classes, c.transitions, strict=True):
            lines.append(name.ljust(w) + "".join(f"{v:11.6f}" for v in row))
    card = c.card
    lines.append("card:")
    if not card:
        lines.append("  (empty)")
    if card.get("notice"):
        lines.append(f"  NOTICE: {card['notice']}")
    for key in ("name", "classifier", "command"):
        if card.get(key):
            lines.append(f"  {key}: {card[key]}")
    data = card.get("data") or {}
    if data:
        lines.append(
            f"  data: {data.get('animals', '?')} animals, {data.get('collars', '?')} collars,"
            f" {data.get('windows_labelled', '?')} labelled windows"
        )
        meta = data.get("meta") or {}
        if meta:
            lines.append(f"  data source: {json.dumps(meta, sort_keys=True)}")
    for key, label in (
        ("cross_validation", "cross-validation (grouped by animal)"),
        ("baseline", "majority baseline"),
        ("holdout", "held-out animals"),
    ):
        if key in card:
            lines += _scores_line(label, card[key])
            if card[key].get("meta"):
                lines.append(f"    data source: {json.dumps(card[key]['meta'], sort_keys=True)}")
    versions = card.get("trained_with")
    if versions:
        lines.append("  trained with: " + ", ".join(f"{k} {v}" for k, v in versions.items()))
    return "\n".join(lines)


@app.command("info")
def info(
    file: Path | None = typer.Argument(
        None, help="Model file (.onnx); the shipped default when left out."
    ),
    as_json: bool = typer.Option(False, "--json", help="Print the contract and card as JSON."),
) -> None:
    """Check FILE against the model contract and print the contract and the model card.

    A model that breaks the contract (wrong input name or rank, rows not summing to 1,
    missing metadata) is refused with a message naming the problem, exit 1.

    Example: boutline model info models/default.onnx
    """
    from ..model import load_model

    m = load_model(file)
    if as_json:
        c = m.contract
        doc = {
            "model": m.source,
            "classes": list(c.classes),
            "sample_rate_hz": c.sample_rate_hz,
            "window_s": c.window_s,
            "hop_s": c.hop_s,
            "window_len": c.window_len,
            "transitions": None if c.transitions is None else c.transitions.tolist(),
            "card": c.card,
        }
        typer.echo(json.dumps(doc, indent=2))
    else:
        typer.echo(describe(m))
