"""A sweep's folder: the resume journal, ``trials.parquet``, ``best.toml`` and ``sweep.json``.

Layout of ``--out DIR``::

    sweep.json       what was swept (scenario, specs, seeds, condition, search); a rerun with
                     the same definition resumes, a different one is refused
    trials.jsonl     the journal: one JSON line per finished trial, flushed and fsynced as each
                     trial finishes, so a killed sweep loses at most the trials in flight
    trials.parquet   one row per trial (written at the end from the journal), columns:
                       trial, trial_key, condition,
                       param.<NAME>          one per varied name (e.g. param.agent.goal_precision)
                       metric.<METRIC>       summary over the trial's seeds (see search.METRICS)
                       seeds                 list of the seeds run
                       seed.success, seed.time_to_success_s, seed.final_error_m
                                             lists aligned with ``seeds``
                       timing.wall_s, timing.cpu_s, timing.agent_step_us, timing.sim_step_us,
                       timing.worker_pid, timing.started_unix_s (when the trial started)
                                             measured, not reproducible: kept out of metric.*
    best.toml        the best trial's scenario, ready for ``blanket run best.toml``
    objective.png    heatmap (two names) or line plots (one or more names) of the objective
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

from blanket.errors import ConfigError

__all__ = [
    "JOURNAL",
    "TABLE",
    "BEST",
    "SWEEP",
    "Journal",
    "open_sweep_dir",
    "records_table",
    "write_table",
    "read_trials",
    "best_record",
    "write_best",
]

JOURNAL = "trials.jsonl"
TABLE = "trials.parquet"
BEST = "best.toml"
SWEEP = "sweep.json"
_OUTPUTS = (JOURNAL, TABLE, BEST, SWEEP, "objective.png")


class Journal:
    """Append-only JSON-lines file of finished trials (one line per trial, fsynced).

    ``required``: the keys every record has (lines without them are not records).
    """

    def __init__(self, path: str | Path, required: Sequence[str] = ("key", "metrics")) -> None:
        self.path = Path(path)
        self.required = tuple(required)

    def read(self) -> list[dict[str, Any]]:
        """Finished trials; a line cut short by a kill (the last one) is ignored."""
        if not self.path.is_file():
            return []
        records = []
        for line in self.path.read_text(encoding="utf-8").splitlines():
            line = line.strip()
            if not line:
                continue
            try:
                rec = json.loads(line)
            except json.JSONDecodeError:
                continue
            if isinstance(rec, dict) and all(k in rec for k in self.required):
                records.append(rec)
        return records

    def append(self, record: Mapping[str, Any]) -> None:
        """Write one trial and force it to disk before returning."""
        line = json.dumps(record, sort_keys=True, default=_json_default)
        # a previous writer killed mid-line leaves no newline: start on a fresh line
        prefix = ""
        if self.path.is_file() and self.path.stat().st_size > 0:
            with open(self.path, "rb") as fh:
                fh.seek(-1, os.SEEK_END)
                if fh.read(1) != b"\n":
                    prefix = "\n"
        with open(self.path, "a", encoding="utf-8") as fh:
            fh.write(prefix + line + "\n")
            fh.flush()
            os.fsync(fh.fileno())


def _json_default(v: Any) -> Any:
    import numpy as np

    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, np.floating):
        return float(v)
    if isinstance(v, np.bool_):
        return bool(v)
    if isinstance(v, np.ndarray):
        return v.tolist()
    raise TypeError(f"cannot store {type(v).__name__} in the journal")


def _differences(old: Mapping[str, Any], new: Mapping[str, Any]) -> list[str]:
    keys = sorted(set(old) | set(new))
    return [
        k
        for k in keys
        if json.dumps(old.get(k), sort_keys=True) != json.dumps(new.get(k), sort_keys=True)
    ]


def open_sweep_dir(out: str | Path, definition: Mapping[str, Any], overwrite: bool) -> Path:
    """Prepare ``out`` for a sweep: new, resumed (same definition) or cleared (``overwrite``).

    Raises
    ------
    ConfigError
        ``out`` is a file, holds other files without a sweep record, or holds a different
        sweep, and ``overwrite`` is False.
    """
    path = Path(out)
    if path.exists() and not path.is_dir():
        raise ConfigError(f"--out {str(path)!r} exists and is not a folder")
    record = path / SWEEP
    definition = json.loads(json.dumps(definition, default=_json_default))
    if path.is_dir() and any(path.iterdir()):
        if overwrite:
            for name in _OUTPUTS:
                (path / name).unlink(missing_ok=True)
            for png in path.glob("objective-*.png"):
                png.unlink()
        elif not record.is_file():
            raise ConfigError(
                f"--out {str(path)!r} is not empty and holds no sweep; pass --overwrite to reuse it"
            )
        else:
            try:
                old = json.loads(record.read_text(encoding="utf-8"))
            except json.JSONDecodeError:
                raise ConfigError(
                    f"--out {str(path)!r}: {SWEEP} is unreadable; pass --overwrite to start over"
                ) from None
            diff = _differences(old, definition)
            if diff:
                raise ConfigError(
                    f"--out {str(path)!r} holds a different sweep (differs in: {', '.join(diff)}); "
                    "pass --overwrite to start over or choose another --out"
                )
    path.mkdir(parents=True, exist_ok=True)
    if not record.is_file():
        tmp = path / f".{SWEEP}.tmp"
        tmp.write_text(json.dumps(definition, indent=2, sort_keys=True) + "\n", encoding="utf-8")
        tmp.replace(record)
    return path


def records_table(records: Sequence[Mapping[str, Any]], names: Sequence[str]) -> Any:
    """The trials as a ``pandas.DataFrame`` with the columns of ``trials.parquet``."""
    import pandas as pd

    from blanket.tune.search import METRICS

    rows = []
    for rec in sorted(records, key=lambda r: r["index"]):
        row: dict[str, Any] = {
            "trial": int(rec["index"]),
            "trial_key": rec["key"],
            "condition": rec.get("condition") or "nominal",
        }
        for n in names:
            row[f"param.{n}"] = rec["overrides"].get(n)
        for m in METRICS:
            v = rec["metrics"].get(m)
            row[f"metric.{m}"] = math.nan if v is None else float(v)
        per = rec["per_seed"]
        row["seeds"] = [int(s) for s in per["seed"]]
        row["seed.success"] = [bool(s) for s in per["success"]]
        row["seed.time_to_success_s"] = [
            None if v is None else float(v) for v in per["time_to_success_s"]
        ]
        row["seed.final_error_m"] = [float(v) for v in per["final_error_m"]]
        for k in ("wall_s", "cpu_s", "agent_step_us", "sim_step_us", "pid", "started_unix_s"):
            v = rec.get("timing", {}).get(k)
            col = "timing.worker_pid" if k == "pid" else f"timing.{k}"
            row[col] = math.nan if v is None else float(v)
        rows.append(row)
    frame = pd.DataFrame(rows)
    for n in names:
        col = f"param.{n}"
        if col in frame and frame[col].map(type).nunique() > 1:
            kinds = set(frame[col].map(type))
            if not kinds <= {int, float}:
                frame[col] = frame[col].map(str)
    return frame


def write_table(frame: Any, path: str | Path, definition: Mapping[str, Any]) -> Path:
    """Write ``trials.parquet`` atomically, with the sweep definition in the file metadata."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = Path(path)
    table = pa.Table.from_pandas(frame, preserve_index=False)
    meta = dict(table.schema.metadata or {})
    meta[b"blanket.sweep"] = json.dumps(definition, default=_json_default).encode()
    table = table.replace_schema_metadata(meta)
    tmp = path.with_name(f".{path.name}.tmp")
    pq.write_table(table, tmp)
    tmp.replace(path)
    return path


def read_trials(out: str | Path) -> Any:
    """``trials.parquet`` of a sweep folder as a ``pandas.DataFrame``."""
    import pandas as pd

    path = Path(out) / TABLE
    if not path.is_file():
        raise ConfigError(f"{str(path)!r} does not exist; run the sweep first")
    return pd.read_parquet(path)


def best_record(records: Iterable[Mapping[str, Any]], objective: Any) -> Mapping[str, Any] | None:
    """The trial that sorts first under ``objective.sort_key`` (None when there is none)."""
    recs = list(records)
    if not recs:
        return None
    return min(recs, key=lambda r: objective.sort_key(r["metrics"], int(r["index"])))


def write_best(
    out: str | Path,
    scenario: Any,
    record: Mapping[str, Any],
    objective: Any,
    seeds: Sequence[int],
    condition: str | None = None,
) -> Path:
    """Write ``best.toml``: the scenario with the best trial's values, and a comment header."""
    from blanket.tune.space import apply_overrides

    best = apply_overrides(scenario, record["overrides"], suffix="tuned")
    value = record["metrics"].get(objective.metric)
    lines = [
        f"# best trial {record['index']} of a sweep: {objective.text} = {value}",
        f"# over seeds {', '.join(str(s) for s in seeds)}; "
        + ", ".join(f"{k} = {v!r}" for k, v in record["overrides"].items()),
    ]
    if condition not in (None, "nominal"):
        lines.append(
            f"# tuned under the condition {condition}; this file holds the nominal scenario "
            f"(`blanket bench` applies conditions)"
        )
    path = Path(out) / BEST
    tmp = path.with_name(f".{path.name}.tmp")
    # file paths relative to the sweep folder: best.toml keeps working when the folder moves
    # together with the files it names (or is copied to another machine with them)
    text = best.to_toml(relative_to=path.parent)
    tmp.write_text("\n".join(lines) + "\n" + text, encoding="utf-8")
    tmp.replace(path)
    return path
