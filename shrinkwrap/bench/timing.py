"""The batch each step's output is timed on, kept beside it (<step>/timing.json): token ids, mask and segment
ids as the model reads them. With it, any step folder can be timed again later, alone or with others in
interleaved rounds (a search's candidates with the teacher, `run --retime`), without the data or a tokenizer."""
from __future__ import annotations

from pathlib import Path
from typing import Optional

import numpy as np

from shrinkwrap.serve.rundir import TIMING_FILE, read_json_or_none, write_json_atomic


def write_timing_batch(folder: Path, batch: dict[str, np.ndarray]) -> None:
    """Keeps `batch` beside the folder's model; a folder that holds it already is left untouched."""
    saved = {k: np.asarray(v).tolist() for k, v in batch.items()}
    if read_json_or_none(Path(folder) / TIMING_FILE) != saved:
        write_json_atomic(Path(folder) / TIMING_FILE, saved)


def read_timing_batch(folder: Path) -> Optional[dict[str, np.ndarray]]:
    """The batch the folder's model is timed on; None when the folder has none (made before it was kept)."""
    saved = read_json_or_none(Path(folder) / TIMING_FILE)
    if not isinstance(saved, dict) or "input_ids" not in saved:
        return None
    return {k: np.asarray(v, dtype=np.int64) for k, v in saved.items()}
