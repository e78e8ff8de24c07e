"""Pruning old steps' potential maps down to their digest (the wells table stays).

Potential maps are the bulk of a campaign's disk (an 8-million-point map is ~30 MB compressed).
Once a step is recorded, its map is needed only to replay its decision; the decision itself —
every well considered, its potential, the rule and the choice — is kept in ``decision.json`` and
the ledger. :func:`prune` removes the maps of all recorded steps but the newest ``keep``
(``potential.npz`` in the step folder and the engine's map files), and writes
``steps/NNNN/pruned.json`` listing each removed file with the sha256 the ledger recorded for it.
``ionwell verify`` then reports those files as pruned, not missing; ``ionwell replay`` says which
steps it could re-derive fully.
"""

from __future__ import annotations

import json
from pathlib import Path

from pydantic import BaseModel

from ionwell.store.campaign import CampaignPaths, atomic_write_json
from ionwell.store.ledger import read_ledger
from ionwell.store.paths import StepPaths

__all__ = ["MAP_SUFFIXES", "PRUNED", "PruneReport", "prune", "pruned_files"]

#: engine files that hold potential maps or other volumetric data
MAP_SUFFIXES = (".npz", ".cube", ".npy", ".xsf")
PRUNED = "pruned.json"


class PruneReport(BaseModel):
    """What :func:`prune` removed."""

    steps: list[int]
    files: int
    bytes: int


def pruned_files(step_dir: Path) -> dict[str, str]:
    """Files pruned from a step folder (step-relative path -> recorded sha256)."""
    f = Path(step_dir) / PRUNED
    if not f.is_file():
        return {}
    try:
        data = json.loads(f.read_text())
    except (OSError, ValueError):
        return {}
    return (
        {str(k): str(v) for k, v in data.get("files", {}).items()} if isinstance(data, dict) else {}
    )


def _is_map(rel: str) -> bool:
    name = rel.rsplit("/", 1)[-1]
    return rel == StepPaths(Path(".")).potential.name or (
        rel.startswith("engine/") and name.endswith(MAP_SUFFIXES)
    )


def prune(root: str | Path, keep: int = 5, dry_run: bool = False) -> PruneReport:
    """Remove the maps of every recorded step except the newest ``keep`` (≥ 1: the newest map
    is what extending or rejecting a site starts from)."""
    paths = CampaignPaths(Path(root))
    keep = max(1, int(keep))
    records = read_ledger(paths.ledger)
    steps, count, size = [], 0, 0
    for rec in records[:-keep] if len(records) > keep else []:
        sp = StepPaths(paths.step(rec.step))
        gone = pruned_files(sp.root)
        todo = {rel: d for rel, d in rec.files.items() if _is_map(rel) and (sp.root / rel).exists()}
        if not todo:
            continue
        seen: set[int] = set()
        for rel in todo:
            st = (sp.root / rel).stat()
            if st.st_ino not in seen:  # the step's map is a hard link to the engine's
                size += st.st_size
                seen.add(st.st_ino)
        count += len(todo)
        steps.append(rec.step)
        if dry_run:
            continue
        atomic_write_json(sp.root / PRUNED, {"files": {**gone, **todo}})
        for rel in todo:
            (sp.root / rel).unlink()
    return PruneReport(steps=steps, files=count, bytes=size)
