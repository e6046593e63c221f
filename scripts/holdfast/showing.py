"""What ``holdfast open`` shows before it asks: what will be opened, and what the choice rests on."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from . import display
from ._io import read_json
from .layout import CHOICE, MANIFEST


def opening_preview(exp: Path, plan: Any) -> list[str]:
    """Lines naming the winner, its CV estimate and optimism, the selection so far and the test rows."""
    choice = read_json(exp / CHOICE)
    manifest = read_json(exp / MANIFEST)
    winner = choice["winner"]
    metric = choice["metric"]
    unit = plan.config["data"].get("unit")
    corrected = display.corrected_list(choice.get("optimism") or {}, metric, unit)
    rounds = choice.get("rounds") or {}
    lines = [
        f"about to open the sealed test set of experiment '{plan.config['experiment']}' "
        f"({manifest['counts']['test']} sealed rows), opening {plan.opened + 1} of {plan.allowed_openings} allowed",
        f"winner: {winner['family']} {winner['candidate']} by {choice['rule'].replace('_', ' ')}; CV "
        f"{display.named(metric, winner['mean'], unit)} (corrected standard error {winner['se_corrected']:.4f}, "
        f"{winner['folds']} folds)",
        "corrected for selection: " + (corrected or "not available"),
        f"chosen after {rounds.get('count', 1)} selection round(s), "
        f"{rounds.get('candidates_tried', choice.get('candidates'))} candidate(s) tried in all",
        "after the opening the experiment is closed: nothing that decided this winner can change any more",
    ]
    return lines
