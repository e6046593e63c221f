"""What ``holdfast open`` shows before it asks: what will be opened, and what the choice rests on."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ._io import read_json
from .layout import CHOICE, MANIFEST


def opening_preview(exp: Path, plan: Any) -> list[str]:
    """Lines naming the winner, its CV estimate and optimism, the selection so far and the test rows."""
    choice = read_json(exp / CHOICE)
    manifest = read_json(exp / MANIFEST)
    winner = choice["winner"]
    metric = choice["metric"]
    optimism = choice.get("optimism") or {}
    corrected = []
    for key, label in (("bbc", "BBC-CV"), ("tibshirani", "Tibshirani–Tibshirani")):
        value = (optimism.get(key) or {}).get("corrected")
        if value is not None:
            corrected.append(f"{label} {value:.4f}")
    rounds = choice.get("rounds") or {}
    lines = [
        f"about to open the sealed test set of experiment '{plan.config['experiment']}' "
        f"({manifest['counts']['test']} sealed rows), opening {plan.opened + 1} of {plan.allowed_openings} allowed",
        f"winner: {winner['family']} {winner['candidate']} by {choice['rule']}; CV {metric} {winner['mean']:.4f} "
        f"(corrected se {winner['se_corrected']:.4f}, {winner['folds']} folds)",
        "corrected for selection: " + (", ".join(corrected) if corrected else "not available"),
        f"chosen after {rounds.get('count', 1)} selection round(s), "
        f"{rounds.get('candidates_tried', choice.get('candidates'))} candidate(s) tried in all",
        "after the opening the experiment is closed: nothing that decided this winner can change any more",
    ]
    return lines
