"""The params template documents every key of the schema (issue: a user learns the keys from it)."""
from __future__ import annotations

import re
from pathlib import Path
from typing import Dict, Iterator, List, Tuple

from pydantic import BaseModel

from gapbook.params import Params

REPO = Path(__file__).resolve().parents[1]
TEMPLATE = REPO / "params" / "template.yaml"


def _nested_model(annotation) -> type | None:
    """The pydantic model inside Optional[...], Dict[str, ...], List[...] or Union[...], if any."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return annotation
    for arg in getattr(annotation, "__args__", ()) or ():
        found = _nested_model(arg)
        if found is not None:
            return found
    return None


def _schema_keys(model: type, section: str) -> Iterator[Tuple[str, str]]:
    """(section, key) for every field of a section's model and of the models nested in it."""
    for name, field in model.model_fields.items():
        yield section, name
        inner = _nested_model(field.annotation)
        if inner is not None:
            yield from _schema_keys(inner, section)


def _section_blocks(text: str) -> Dict[str, str]:
    """Each top-level section's text (commented-out section headers count too)."""
    blocks: Dict[str, List[str]] = {}
    current = None
    for line in text.splitlines():
        header = re.match(r"^#?\s?([a-z_]+):", line) if not line.startswith(("  ", "#  ")) else None
        if header and (not line.startswith("#") or line.startswith("# ") and line[2:3].isalpha()):
            current = header.group(1)
            blocks.setdefault(current, [])
        if current is not None:
            blocks[current].append(line)
    return {name: "\n".join(lines) for name, lines in blocks.items()}


def test_template_documents_every_key_of_the_schema():
    # The schema in params.py is the single source of keys; the template must name each one
    # (as a key or a commented example) inside its own section.
    blocks = _section_blocks(TEMPLATE.read_text(encoding="utf-8"))
    missing = []
    for section, field in Params.model_fields.items():
        if section == "source":
            continue
        if section not in blocks:
            missing.append(section)
            continue
        model = _nested_model(field.annotation)
        for _, key in (_schema_keys(model, section) if model is not None else ()):
            if not re.search(rf"(?<![\w.]){re.escape(key)}:", blocks[section]):
                missing.append(f"{section}.{key}")
    assert not missing, f"params/template.yaml does not document: {', '.join(missing)}"


def test_the_packaged_template_is_the_repository_template():
    # `gapbook new` copies the packaged twin; it must say exactly what the repository's says.
    assert (REPO / "src" / "gapbook" / "data" / "params_template.yaml").read_bytes() == TEMPLATE.read_bytes()


def test_the_schema_walk_finds_nested_keys():
    # Guards the test above against a walk that silently finds nothing.
    keys = {f"{s}.{k}" for s, k in _schema_keys(Params.model_fields["variables"].annotation.__args__[1], "variables")}
    assert {"variables.type", "variables.applies_if"} <= keys
    grid = {k for _, k in _schema_keys(Params.model_fields["sensitivity"].annotation, "sensitivity")}
    assert {"delta", "values", "groups"} <= grid
