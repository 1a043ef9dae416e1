"""What a stage notebook needs: its params, the study after intake, and where to write.

A notebook's ``parameters`` cell holds ``params = None`` (the demo study) and
``out_dir = "."``; the runner injects the resolved params dict and the record folder.
``open_stage`` turns those into a :class:`StageContext` and every table and figure goes
through it, so file names, CSV formatting and figure settings are the same everywhere
and a rerun writes the same bytes.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Any, Dict, Optional, Tuple, Union

import pandas as pd

from .intake import Study, load_study
from .params import Params, load_params
from .vocabulary import strategy_rank

CSV_FLOAT_FORMAT = "%.10g"
ESTIMATE_COLUMNS = ("strategy", "term", "estimate", "std_error", "ci_lower", "ci_upper", "p_value", "n_used",
                    "df", "fmi", "riv")


def write_csv(frame: pd.DataFrame, path: Path) -> Path:
    """Write a table the one way gapbook writes tables (fixed float format, '\\n' line ends)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    frame.to_csv(path, index=False, float_format=CSV_FLOAT_FORMAT, lineterminator="\n")
    return path


@dataclass(frozen=True)
class AuditRun:
    """The audit stage's result with the intake notes and which engine counted it, and why."""

    result: Any  # gapbook.audit.AuditResult
    notes: Tuple[str, ...]
    engine: str
    why: str


@dataclass
class StageContext:
    """The params, the study and the record folder of one stage run."""

    params: Params
    out_dir: Path

    @cached_property
    def study(self) -> Study:
        return load_study(self.params)

    def audit(self) -> AuditRun:
        """Audit the study with the engine ``data.engine`` picks: pandas in memory, or DuckDB over the file."""
        from .audit import audit_study
        from .audit_duckdb import audit_scanned
        from .intake_duckdb import choose_engine, scan_study

        engine, why = choose_engine(self.params)
        settings = self.params.audit
        options = dict(threshold=settings.threshold, by=settings.by, top_patterns=settings.top_patterns)
        if engine == "duckdb":
            with scan_study(self.params) as scanned:
                return AuditRun(audit_scanned(scanned, **options), scanned.notes, engine, why)
        return AuditRun(audit_study(self.study, **options), self.study.notes, engine, why)

    @property
    def tables_dir(self) -> Path:
        return self.out_dir / "tables"

    @property
    def figures_dir(self) -> Path:
        return self.out_dir / "figures"

    def save_table(self, name: str, frame: pd.DataFrame) -> Path:
        return write_csv(frame, self.tables_dir / f"{name}.csv")

    def read_table(self, name: str) -> Optional[pd.DataFrame]:
        """A table an earlier stage wrote to this record, or None when that stage has not run."""
        path = self.tables_dir / f"{name}.csv"
        return pd.read_csv(path) if path.is_file() else None

    def save_figure(self, name: str, figure: Any) -> Path:
        """Save a matplotlib figure as PNG (no time stamp in its metadata, so reruns match)."""
        self.figures_dir.mkdir(parents=True, exist_ok=True)
        path = self.figures_dir / f"{name}.png"
        figure.savefig(path, dpi=110, bbox_inches="tight", metadata={"Software": None})
        return path

    def update_estimates(self, rows: pd.DataFrame) -> pd.DataFrame:
        """Replace this strategy's rows in ``estimates.csv``, keep the others, and return the whole table."""
        return merge_estimates(self.read_table("estimates"), rows, self.tables_dir / "estimates.csv")


def merge_estimates(existing: Optional[pd.DataFrame], rows: pd.DataFrame, path: Path) -> pd.DataFrame:
    strategies = set(rows["strategy"])
    parts = [rows] if existing is None else [existing[~existing["strategy"].isin(strategies)], rows]
    table = pd.concat([p for p in parts if len(p)], ignore_index=True)
    for column in ESTIMATE_COLUMNS:
        if column not in table.columns:
            table[column] = float("nan")
    extra = [c for c in table.columns if c not in ESTIMATE_COLUMNS]
    table = table.assign(_order=table["strategy"].map(strategy_rank))
    table = table.sort_values(["_order", "strategy"], kind="stable").drop(columns="_order")
    table = table[list(ESTIMATE_COLUMNS) + extra].reset_index(drop=True)
    write_csv(table, path)
    return table


def open_stage(params: Union[None, str, Path, Dict[str, Any]] = None, out_dir: str = ".") -> StageContext:
    """The context for a stage notebook.

    ``params`` is the resolved dict the runner injects, a path to a params YAML file (handy
    when a notebook is opened by hand for a one-off question), or None for the demo study.
    """
    if params is None:
        from .demo import demo_params
        resolved = demo_params()
    elif isinstance(params, (str, Path)):
        resolved = load_params(params)
    else:
        resolved = Params.from_dict(params, source=params.get("source"))
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    return StageContext(params=resolved, out_dir=out)
