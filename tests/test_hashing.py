"""Narrow keys: canonical hashes of settings, code closures and seeds (foldwise.provenance.hashing)."""

import hashlib

import pytest

from foldwise.provenance.hashing import canonical_json, code_hash, hash_file, hash_object, module_closure, seed_from


def test_canonical_json_ignores_key_order_but_not_values():
    assert canonical_json({"b": 1, "a": [1, 2]}) == canonical_json({"a": [1, 2], "b": 1})
    assert hash_object({"a": 1}) != hash_object({"a": 1.0}) or canonical_json(1) != canonical_json(1.0)
    assert hash_object({"a": [1, 2]}) != hash_object({"a": [2, 1]})


def test_canonical_json_refuses_nan():
    with pytest.raises(ValueError, match="non-finite"):
        canonical_json({"x": float("nan")})


def test_hash_file_equals_hashlib(tmp_path):
    # Reference: hashlib.sha256 of the whole content (Python standard library).
    path = tmp_path / "blob.bin"
    data = bytes(range(256)) * 9000
    path.write_bytes(data)
    assert hash_file(path) == hashlib.sha256(data).hexdigest()


def test_module_closure_follows_imports_transitively():
    names = {path.name for path in module_closure("foldwise.provenance.memo")}
    assert {"memo.py", "errors.py", "fileio.py", "hashing.py"} <= names
    assert "config.py" not in names


def test_code_hash_changes_with_an_imported_module(tmp_path, monkeypatch):
    import foldwise.provenance.hashing as hashing

    package = tmp_path / "foldwise"
    package.mkdir()
    (package / "__init__.py").write_text("")
    (package / "a.py").write_text("from .b import f\n")
    (package / "b.py").write_text("def f():\n    return 1\n")
    monkeypatch.setattr(hashing, "_PACKAGE_DIR", package)
    before = code_hash("foldwise.a")
    (package / "b.py").write_text("def f():\n    return 2\n")
    assert code_hash("foldwise.a") != before


def test_seed_from_is_stable_and_identity_specific():
    assert seed_from(7, "decode", "01") == seed_from(7, "decode", "01")
    assert seed_from(7, "decode", "01") != seed_from(7, "decode", "02")
    assert seed_from(7, "decode", "01") != seed_from(8, "decode", "01")
    assert 0 <= seed_from(7, "x") < 2**63


def test_job_modules_reach_their_science_through_two_level_relative_imports():
    # jobs/*.py import ``from ..glm import x``: the code hash must cover glm.py and its imports.
    names = {path.name for path in module_closure("foldwise.jobs.roi_counts")}
    assert "fileio.py" in names and "errors.py" in names


def test_module_closure_sees_an_edited_script_after_a_cached_parse(tmp_path):
    # The parse of each file is cached per process (Snakemake hashes ~20 closures that share modules);
    # an edit changes the file's size or mtime, so the next closure parses it again.
    script = tmp_path / "step.py"
    script.write_text("import foldwise.errors\n", encoding="utf-8")
    first = {path.name for path in module_closure(str(script))}
    script.write_text("import foldwise.errors\nimport foldwise.provenance.hashing\n", encoding="utf-8")
    second = {path.name for path in module_closure(str(script))}
    assert "hashing.py" not in first and "hashing.py" in second
    assert module_closure(str(script)) == module_closure(str(script))  # a cached parse gives the same closure


def test_the_import_scan_names_what_a_full_parse_of_every_package_module_and_script_names():
    # Reference: Python's own parser (ast.parse of the whole module, ast.walk over every node).
    from pathlib import Path

    from foldwise.provenance import hashing

    workflow = Path(hashing.__file__).resolve().parents[2]
    files = sorted((workflow / "foldwise").rglob("*.py")) + sorted((workflow / "scripts").glob("*.py"))
    assert len(files) > 80
    for path in files:
        assert hashing._parse_imports(path) == hashing._parse_imports(path, full_parse=True), path


@pytest.mark.parametrize("source, expected", [
    # a parenthesised import whose comments hold parentheses, and a backslash continuation
    ("from foldwise.data.bids import (read_events,  # why (it)\n    read_tr_s)  # end\n"
     "from foldwise.glm import \\\n    estimate\n",
     {"foldwise.data.bids", "foldwise.data.bids.read_events", "foldwise.data.bids.read_tr_s", "foldwise.glm",
      "foldwise.glm.estimate"}),
    # text in a string that looks like an import and does not parse alone: the whole module is parsed instead
    ('"""Notes.\n\nfrom the config import nothing\n"""\nimport foldwise.masks.build\n', {"foldwise.masks.build"}),
    # an import inside a function counts, as it does for ast.walk
    ("def late():\n    from foldwise.stats import group\n", {"foldwise.stats", "foldwise.stats.group"}),
])
def test_the_import_scan_handles_continuations_comments_and_look_alikes(tmp_path, source, expected):
    from foldwise.provenance import hashing

    path = tmp_path / "module.py"
    path.write_text(source, encoding="utf-8")
    assert hashing._parse_imports(path) == expected == hashing._parse_imports(path, full_parse=True)
