"""The record of a run: its folder, manifest, HTML bundle, and the comparison used by ``verify``.

A record is written under a hidden temporary name beside its final place and renamed
only when complete, so a half-written record never looks like a finished one, and a
new record never replaces an old one (a numbered suffix is added instead).
"""
from __future__ import annotations

import hashlib
import html
import json
import os
import platform
import re
import shutil
import sys
import tempfile
from dataclasses import dataclass
from datetime import datetime
from importlib import metadata
from pathlib import Path
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from . import __version__
from .errors import InputError

PACKAGES = ("numpy", "pandas", "scipy", "statsmodels", "matplotlib", "seaborn", "pydantic", "PyYAML", "joblib",
            "papermill", "nbconvert", "nbformat", "nbclient", "ipykernel", "pyarrow", "openpyxl", "formulaic", "patsy")
CAUTIONS = (
    "Missing at random (MAR) cannot be verified from the data: every analysis here rests on assumptions about "
    "why values are missing, and the sensitivity analyses show how far conclusions depend on them.",
    "These results support, and do not replace, the study's pre-specified statistical analysis plan and the "
    "judgement of a qualified statistician.",
    "Report missing data as the journal's reporting guideline asks (e.g. CONSORT, STROBE) and follow local "
    "data-protection rules before sharing this record.",
)
TABLE_TOLERANCE = 1e-9


def sha256_bytes(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def sha256_file(path: Path) -> str:
    return sha256_bytes(path.read_bytes())


def slug(text: str) -> str:
    cleaned = re.sub(r"[^A-Za-z0-9]+", "-", text).strip("-").lower()
    return cleaned[:40] or "study"


def package_versions() -> Dict[str, Optional[str]]:
    versions: Dict[str, Optional[str]] = {}
    for name in PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = None
    return versions


@dataclass
class RecordFolder:
    """A record being written: a temporary folder that becomes ``final`` on :meth:`commit`."""

    final: Path
    temp: Path

    @classmethod
    def create(cls, out_root: Path, name: str) -> "RecordFolder":
        # Absolute, because notebooks run with the record as their working directory.
        out_root = Path(out_root).expanduser().resolve()
        try:
            out_root.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise InputError(f"{out_root}: cannot create the output folder ({exc.strerror}); choose another --out") from None
        if not os.access(out_root, os.W_OK):
            raise InputError(f"{out_root}: the output folder is not writable; choose another --out")
        temp = Path(tempfile.mkdtemp(prefix=f".{name}.partial-", dir=out_root))
        for sub in ("notebooks", "tables", "figures", "report"):
            (temp / sub).mkdir()
        return cls(final=out_root / name, temp=temp)

    def commit(self) -> Path:
        """Rename the finished record into place under a name no other record has."""
        target = self.final
        suffix = 2
        while True:
            try:
                # os.rename onto an existing non-empty folder fails, so no record is ever replaced.
                if target.exists():
                    raise FileExistsError(target)
                os.rename(self.temp, target)
                _open_permissions(target)
                return target
            except (FileExistsError, OSError):
                if not target.exists():
                    raise
                target = self.final.with_name(f"{self.final.name}-{suffix}")
                suffix += 1

    def discard(self) -> None:
        shutil.rmtree(self.temp, ignore_errors=True)


def _open_permissions(folder: Path) -> None:
    """mkdtemp makes the folder private; give the finished record the user's usual permissions."""
    mask = os.umask(0)
    os.umask(mask)
    os.chmod(folder, 0o777 & ~mask)


def record_name(study_name: str, when: datetime) -> str:
    return f"{slug(study_name)}-{when.strftime('%Y%m%d-%H%M%S')}"


def table_digests(folder: Path) -> Dict[str, str]:
    tables = folder / "tables"
    return {p.name: sha256_file(p) for p in sorted(tables.glob("*.csv"))}


def build_manifest(*, params_dict: Dict[str, Any], data_path: str, data_sha256: str, stages: Sequence[Dict[str, Any]],
                   notebook_digests: Dict[str, str], started: datetime, ended: datetime, folder: Path) -> Dict[str, Any]:
    seeds = {"imputation": params_dict.get("imputation", {}).get("seed"),
             "simulation": params_dict.get("simulation", {}).get("seed")}
    return {
        "gapbook_version": __version__,
        "study": params_dict.get("study", {}).get("name"),
        "params": params_dict,
        "data": {"path": data_path, "sha256": data_sha256},
        "notebooks": notebook_digests,
        "stages": list(stages),
        "tables": table_digests(folder),
        "seed": seeds,
        "packages": package_versions(),
        "python": sys.version.split()[0],
        "platform": platform.platform(),
        "started": started.isoformat(timespec="seconds"),
        "ended": ended.isoformat(timespec="seconds"),
    }


def write_json(path: Path, body: Dict[str, Any]) -> None:
    path.write_text(json.dumps(body, indent=2, sort_keys=False, default=str) + "\n", encoding="utf-8")


def read_manifest(record: Path) -> Dict[str, Any]:
    path = record / "manifest.json"
    if not path.is_file():
        raise InputError(f"{record}: not a gapbook record (no manifest.json); give the folder that 'run' printed")
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError:
        raise InputError(f"{path}: manifest.json is not valid JSON; the record is damaged") from None


# ---------------------------------------------------------------------------
# HTML bundle

def notebook_to_html(notebook: Path, target: Path) -> None:
    import nbformat
    from nbconvert import HTMLExporter

    exporter = HTMLExporter(template_name="lab")
    exporter.exclude_input_prompt = True
    exporter.exclude_output_prompt = True
    body, _ = exporter.from_notebook_node(nbformat.read(notebook, as_version=4))
    target.write_text(body, encoding="utf-8")


def write_index(folder: Path, title: str, pages: Sequence[Tuple[str, str, float]], manifest: Dict[str, Any]) -> Path:
    """``report/index.html``: the study, the cautions and one link per stage page."""
    items = "\n".join(
        f'<li><a href="{html.escape(page)}">{html.escape(label)}</a> <span class="t">({seconds:.1f} s)</span></li>'
        for label, page, seconds in pages
    )
    tables = "\n".join(f'<li><a href="../tables/{html.escape(n)}">{html.escape(n)}</a></li>'
                       for n in manifest.get("tables", {}))
    cautions = "\n".join(f"<li>{html.escape(c)}</li>" for c in CAUTIONS)
    summary = _summary_html(folder)
    body = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>
<style>body{{font-family:system-ui,sans-serif;max-width:52rem;margin:2rem auto;line-height:1.5;color:#222}}
.t{{color:#777;font-size:.9em}} .caution{{background:#fbf6ec;border-left:4px solid #D9822B;padding:.5rem 1rem}}
code{{background:#f3f3f3;padding:0 .2em}}</style></head>
<body>
<h1>{html.escape(title)}</h1>
<p>Study: <b>{html.escape(str(manifest.get('study')))}</b>. Data file <code>{html.escape(Path(manifest['data']['path']).name)}</code>
(sha256 <code>{manifest['data']['sha256'][:16]}…</code>). Run {html.escape(manifest['started'])} to {html.escape(manifest['ended'])},
gapbook {html.escape(manifest['gapbook_version'])}, Python {html.escape(manifest['python'])}.</p>
<div class="caution"><b>Cautions</b><ul>{cautions}</ul></div>
{summary}
<h2>Stages</h2><ol>{items}</ol>
<h2>Tables</h2><ul>{tables}</ul>
<p class="t">Re-run and check this record with <code>gapbook verify &lt;this folder&gt;</code>.</p>
</body></html>
"""
    path = folder / "report" / "index.html"
    path.write_text(body, encoding="utf-8")
    return path


def _summary_html(folder: Path) -> str:
    """The summary stage's drafted text (``tables/report_text.md``) as the front page's body, when it ran."""
    text_path = folder / "tables" / "report_text.md"
    if not text_path.is_file():
        return ""
    import mistune  # nbconvert's own markdown renderer

    text = text_path.read_text(encoding="utf-8")
    # The page has its own title; drop the summary's first-level heading.
    text = re.sub(r"\A# [^\n]*\n", "", text)
    return f'<section class="summary">{mistune.html(text)}</section>'


# ---------------------------------------------------------------------------
# comparing tables (verify)

@dataclass(frozen=True)
class TableCheck:
    table: str
    status: str  # "identical", "equal within tolerance", "different", "missing in rerun", "not in record"
    detail: str = ""

    @property
    def ok(self) -> bool:
        return self.status in ("identical", "equal within tolerance")


def compare_table(recorded: Path, rerun: Path) -> TableCheck:
    """Whether a rerun table matches the recorded one: bytes first, then values within 1e-9 (relative)."""
    name = recorded.name
    if not rerun.is_file():
        return TableCheck(name, "missing in rerun")
    if recorded.read_bytes() == rerun.read_bytes():
        return TableCheck(name, "identical")
    try:
        a, b = pd.read_csv(recorded), pd.read_csv(rerun)
    except Exception as exc:  # a tampered file may not even parse
        return TableCheck(name, "different", f"cannot be read: {exc}")
    if list(a.columns) != list(b.columns) or a.shape != b.shape:
        return TableCheck(name, "different", f"shape {a.shape} vs {b.shape} or columns differ")
    for column in a.columns:
        x, y = a[column], b[column]
        if pd.api.types.is_numeric_dtype(x) and pd.api.types.is_numeric_dtype(y):
            xv, yv = x.to_numpy(dtype=float), y.to_numpy(dtype=float)
            if not np.allclose(xv, yv, rtol=TABLE_TOLERANCE, atol=TABLE_TOLERANCE, equal_nan=True):
                row = int(np.flatnonzero(~np.isclose(xv, yv, rtol=TABLE_TOLERANCE, atol=TABLE_TOLERANCE,
                                                     equal_nan=True))[0])
                return TableCheck(name, "different", f"column {column}, row {row + 1}: {xv[row]!r} vs {yv[row]!r}")
        elif not x.astype(str).equals(y.astype(str)):
            row = int(np.flatnonzero((x.astype(str) != y.astype(str)).to_numpy())[0])
            return TableCheck(name, "different", f"column {column}, row {row + 1}: {x.iloc[row]!r} vs {y.iloc[row]!r}")
    return TableCheck(name, "equal within tolerance")


def compare_tables(record: Path, rerun: Path) -> List[TableCheck]:
    recorded = {p.name: p for p in (record / "tables").glob("*.csv")}
    fresh = {p.name for p in (rerun / "tables").glob("*.csv")}
    checks = [compare_table(recorded[n], rerun / "tables" / n) for n in sorted(recorded)]
    checks += [TableCheck(n, "not in record") for n in sorted(fresh - set(recorded))]
    return checks
