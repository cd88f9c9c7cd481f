"""The README: the order a user needs, a config reference that lists every key of the schema, links that resolve.

Outside references: the schema itself (config/schema.yaml, read with PyYAML
and walked independently of the generator below) and the PNG specification
(file signature) for the screenshot.
"""

import re
from pathlib import Path

import yaml

from foldwise.report import config_reference

REPO = Path(__file__).resolve().parents[1]
README = (REPO / "README.md").read_text(encoding="utf-8")


def _schema_paths(node, path, root):
    """Every key path of the schema, walked here without the generator's code (its own $ref handling)."""
    if "$ref" in node:
        target = root
        for part in node["$ref"].lstrip("#/").split("/"):
            target = target[part]
        node = {**target, **{key: value for key, value in node.items() if key != "$ref"}}
    paths = [path] if path else []
    items = node.get("items") if isinstance(node.get("items"), dict) else None
    if items is not None:
        for name, child in (items.get("properties") or {}).items():
            paths += _schema_paths(child, f"{path}[].{name}", root)
    for name, child in (node.get("properties") or {}).items():
        paths += _schema_paths(child, f"{path}.{name}" if path else name, root)
    if isinstance(node.get("additionalProperties"), dict):
        paths += _schema_paths(node["additionalProperties"], f"{path}.<name>", root)
    return paths


def test_the_config_reference_lists_every_key_of_the_schema():
    schema = yaml.safe_load((REPO / "config" / "schema.yaml").read_text(encoding="utf-8"))
    paths = _schema_paths(schema, "", schema)
    assert len(paths) >= 60
    section = README.split(config_reference.START_MARKER, 1)[1].split(config_reference.END_MARKER, 1)[0]
    missing = [path for path in paths if f"`{path}`" not in section and f"#### `{path}`" not in section]
    assert missing == [], f"keys missing from the README's config reference (run make config-reference): {missing}"


def test_the_config_reference_is_what_the_schema_generates():
    section = README.split(config_reference.START_MARKER, 1)[1].split(config_reference.END_MARKER, 1)[0]
    assert section.strip() == config_reference.reference_markdown().strip(), \
        "the README's config reference is out of date: run make config-reference"


def test_the_sections_come_in_the_order_a_user_needs():
    headings = re.findall(r"(?m)^## (.+)$", README)
    wanted = ["The two commands", "What you get", "Your own study", "Outputs", "Config reference",
              "Methods, and where they come from", "Cautions"]
    positions = [next(index for index, heading in enumerate(headings) if heading.startswith(name)) for name in wanted]
    assert positions == sorted(positions), headings
    assert README.index("results/report/index.html") < README.index("## Your own study")
    assert "make study CONFIG=" in README and "snakemake -n " in README  # a dry run checks a config
    assert "make demo CONFIG=" not in README
    assert "snakemake --report" in README


def test_cluster_internals_and_the_error_table_live_in_docs():
    assert len(README.splitlines()) < 560
    assert "| # | case |" not in README and "### Running on SLURM" not in README
    for link in re.findall(r"\]\(((?:docs|config|workflow)/[^)#]+)\)", README):
        assert (REPO / link).is_file(), link
    assert "(docs/bad-input-table.md)" in README and "(docs/running-large-studies.md)" in README


def test_the_screenshot_is_a_png_in_the_repository():
    images = re.findall(r"!\[[^\]]+\]\(([^)]+)\)", README)
    assert images, "the README shows the report"
    for image in images:
        data = (REPO / image).read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n", image  # Source: PNG specification, 5.2 (signature)


def test_the_cautions_are_plain():
    assert "Research use only" in README and "not for clinical decisions" in README
    assert "does not say that every participant" in README
