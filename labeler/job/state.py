"""The job's state file: what the last committed run saw, written last and atomically."""
from __future__ import annotations

import json
import os
import uuid
from pathlib import Path

from ..errors import ArtifactError
from . import failpoints

STATE_FORMAT = "labeler-job-state/1"


def load_state(work: Path) -> dict | None:
    p = work / "state.json"
    if not p.exists():
        return None
    try:
        state = json.loads(p.read_text())
    except json.JSONDecodeError as exc:
        raise ArtifactError(f"{p}: state file is not valid JSON ({exc}). It is written atomically, so this "
                            "means it was edited or damaged; restore it or remove the work folder for a "
                            "full rebuild.") from None
    if state.get("format") != STATE_FORMAT:
        raise ArtifactError(f"{p}: unknown state format {state.get('format')!r} (this tool writes {STATE_FORMAT}).")
    return state


def write_json(path: Path, data: dict, point: str | None = None) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex}")
    if point:
        failpoints.hit(f"write_{point}")
    with open(tmp, "w") as fh:
        fh.write(json.dumps(data, indent=2, sort_keys=True) + "\n")
        fh.flush()
        os.fsync(fh.fileno())
    if point:
        failpoints.hit(f"mid_{point}_write")
    os.replace(tmp, path)



def current_outputs(work_dir) -> Path:
    """The folder of the job's committed outputs (labels/, footprints.parquet, users.parquet)."""
    state = load_state(Path(work_dir))
    if state is None:
        raise ArtifactError(f"{work_dir}: no committed run yet (no state.json). Run `labeler run --config ...`.")
    return Path(work_dir) / "outputs" / state["generation"]
