"""Parquet observations (a file or a dataset folder).

Takes a path and the configuration; gives the raw frame and the 1-based record number of each row.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from ..config import Config
from ..errors import IngestError
from .canonical import RawTable
from .text import clip


def load_parquet(p: Path, cfg: Config) -> RawTable:
    """The rows of a Parquet file or dataset folder (hive partitions become columns)."""
    import pyarrow as pa
    import pyarrow.dataset as ds

    try:
        dataset = ds.dataset(str(p), format="parquet", partitioning="hive")
        table = dataset.to_table()
    except (pa.ArrowInvalid, OSError) as exc:
        raise IngestError(f"{p}: cannot read as Parquet ({clip(exc)})") from None
    frame = table.to_pandas()
    for c in frame.columns:  # station ids may stay categorical (handled label by label); other labels as text
        if isinstance(frame[c].dtype, pd.CategoricalDtype) and cfg["observations"]["columns"].get(c, c) != "station_id":
            frame[c] = frame[c].astype("string")
    lines = np.arange(1, len(frame) + 1)
    return RawTable(frame, lines, str(p), [], len(frame), [str(p)])
