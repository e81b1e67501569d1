"""``tracelab info``: what a dataset holds, read from its manifest (no table scans)."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import polars as pl

from tracelab.store import schema
from tracelab.store.dataset import open_dataset
from tracelab.wording import counted

KINDS = ("frames", "errors", "status", "marks", "losses")


@dataclass
class DatasetInfo:
    """Per-run and total figures of a dataset; ``describe()`` text, ``as_dict()`` JSON."""

    path: Path
    runs: list[dict[str, Any]]
    totals: dict[str, int]
    buses: list[dict[str, Any]]
    files: list[dict[str, Any]]

    def as_dict(self) -> dict[str, Any]:
        return {"dataset": str(self.path), "runs": self.runs, "totals": self.totals,
                "buses": self.buses, "files": self.files}

    def describe(self) -> str:
        t = self.totals
        out = [f"dataset {self.path}: {counted(len(self.runs), 'run')}, "
               f"{counted(t['files'], 'file')}, {counted(t['lines'], 'line')}",
               "records: " + ", ".join(f"{t[k]:,} {k}" for k in KINDS),
               f"rejects: {t['rejects']:,}; backward time steps: {t['backward_steps']:,}"]
        for bus in self.buses:
            rate = f"nominal {bus['nominal_bps']:,} bit/s"
            if bus["data_bps"]:
                rate += f", data {bus['data_bps']:,} bit/s"
            name = f" ({bus['name']})" if bus.get("name") else ""
            out.append(f"bus {bus['alias']}{name}: {rate}, stamp={bus['stamp']}")
        for run in self.runs:
            span = (f"{run['span_s']:.3f} s (t_ns {run['first_t_ns']} .. {run['last_t_ns']})"
                    if run["span_s"] is not None else "no records")
            origin = f", origin {run['origin']}" if run["origin"] else ""
            vehicle = f", vehicle {run['vehicle']}" if run["vehicle"] else ""
            out.append(f"run {run['run']}: {counted(run['files'], 'file')}, {span}{origin}"
                       f"{vehicle}; {counted(run['frames'], 'frame')}, "
                       f"{counted(run['rejects'], 'reject')}, "
                       f"{counted(run['backward_steps'], 'backward step')}")
        for f in self.files:
            back = (f", first backward step at line {f['first_backward_line']}"
                    if f["first_backward_line"] is not None else "")
            out.append(f"  file {f['file']} (run {f['run']}): {counted(f['lines'], 'line')}, "
                       f"{counted(f['rejects'], 'reject')}{back}")
        return "\n".join(out)


def dataset_info(path: str | Path) -> DatasetInfo:
    """Summarise the dataset at ``path`` (StoreError when it is not one)."""
    ds = open_dataset(path)
    manifest = ds.manifest()
    counts = ["lines", *KINDS, "rejects", "backward_steps"]
    per_run = (
        manifest.group_by("run", maintain_order=True)
        .agg([pl.col(c).sum() for c in counts], files=pl.len(),
             first_t_ns=pl.col("first_t_ns").min(), last_t_ns=pl.col("last_t_ns").max(),
             origin=pl.col("origin").drop_nulls().first(),
             vehicle=pl.col("vehicle").drop_nulls().first())
        .sort("run")
        .with_columns(span_s=(pl.col("last_t_ns") - pl.col("first_t_ns")) / 1e9)
    )
    totals = {"files": manifest.height, **{c: int(manifest[c].sum()) for c in counts}}
    buses: dict[tuple[Any, ...], dict[str, Any]] = {}
    for text in manifest["buses"].to_list():  # one per file: few
        for bus in schema.manifest_buses(text):
            buses.setdefault(tuple(sorted(bus.items(), key=lambda kv: kv[0])), bus)
    files = manifest.select("file", "run", "sha256", "bytes", "lines", "rejects",
                            "backward_steps", "first_backward_line", "ingested_at").to_dicts()
    return DatasetInfo(path=Path(path), runs=per_run.to_dicts(), totals=totals,
                       buses=sorted(buses.values(), key=lambda b: b["alias"]), files=files)
