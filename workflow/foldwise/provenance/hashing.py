"""Canonical hashes of config entries, package code and file contents.

These hashes are the narrow keys of the workflow (docs/architecture.md, invariant 3) and the
ingredients of the content memo (invariant 4).
"""

import ast
import hashlib
import json
import math
import os
from pathlib import Path

__all__ = [
    "canonical_json",
    "hash_object",
    "hash_bytes",
    "hash_file",
    "module_closure",
    "code_hash",
    "seed_from",
]

_PACKAGE_DIR = Path(__file__).resolve().parents[1]  # the foldwise package folder
_CHUNK_BYTES = 1 << 20


def canonical_json(obj):
    """Serialise ``obj`` to JSON with sorted keys and no insignificant spaces.

    Floats that are integral stay distinguishable from ints (``1.0`` vs ``1``)
    because Python's JSON encoder keeps them apart; NaN is refused because it
    has no canonical JSON form.
    """
    def _check(value):
        if isinstance(value, float) and not math.isfinite(value):
            raise ValueError(f"cannot hash a non-finite float: {value!r}")
        if isinstance(value, dict):
            for item in value.values():
                _check(item)
        elif isinstance(value, (list, tuple)):
            for item in value:
                _check(item)

    _check(obj)
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=True)


def hash_bytes(data):
    """sha256 hex digest of a bytes object."""
    return hashlib.sha256(data).hexdigest()


def hash_object(obj):
    """sha256 of the canonical JSON of ``obj`` (a config entry, params, ...)."""
    return hash_bytes(canonical_json(obj).encode("utf-8"))


def hash_file(path):
    """sha256 hex digest of a file's content, read in 1 MiB chunks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for chunk in iter(lambda: handle.read(_CHUNK_BYTES), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _package_of(source_path):
    """The dotted package a source file belongs to (``foldwise.jobs``), or None outside it."""
    try:
        relative = Path(source_path).resolve().relative_to(_PACKAGE_DIR)
    except ValueError:
        return None
    return ".".join(["foldwise", *relative.parts[:-1]])


_IMPORTS_CACHE = {}  # (path, size, mtime_ns) -> frozenset of names: Snakemake hashes ~20 closures that share most modules


def _imported_package_modules(source_path):
    """Names of ``foldwise.*`` modules imported by one source file (relative imports resolved).

    Parsed once per process while the file's size and mtime stay the same.
    """
    status = os.stat(source_path)
    key = (str(source_path), status.st_size, status.st_mtime_ns)
    if key not in _IMPORTS_CACHE:
        _IMPORTS_CACHE[key] = frozenset(_parse_imports(source_path))
    return set(_IMPORTS_CACHE[key])


def _import_statements(text):
    """The import statements of a module's text, each parsed alone: ``ast.parse`` of a whole module is ~15x slower.

    A statement starts a line (after indentation) with ``import`` or ``from``;
    a parenthesised or backslash-continued one runs on. Raises SyntaxError
    when a candidate does not parse alone (text in a string, an unusual
    layout): the caller then parses the whole module. A candidate inside a
    string that does parse names a module the hash then covers as well
    (tests/test_hashing.py checks that every package module gives the same
    names as a full parse).
    """
    lines = text.splitlines()
    statements = []
    index = 0
    while index < len(lines):
        stripped = lines[index].strip()
        index += 1
        if not (stripped.startswith("import ") or (stripped.startswith("from ") and " import" in stripped)):
            continue
        statement = stripped
        code = stripped.split("#", 1)[0]
        if "(" in code and ")" not in code:  # runs on to the line that closes it (newlines kept: comments end there)
            while index < len(lines):
                line = lines[index].strip()
                index += 1
                statement += "\n" + line
                if ")" in line.split("#", 1)[0]:
                    break
        while statement.endswith("\\") and index < len(lines):
            statement = statement[:-1] + " " + lines[index].strip()
            index += 1
        statements.extend(ast.parse(statement).body)
    return statements


def _parse_imports(source_path, full_parse=False):
    text = Path(source_path).read_text(encoding="utf-8")
    package = _package_of(source_path)
    names = set()
    nodes = None
    if not full_parse:
        try:
            nodes = _import_statements(text)
        except SyntaxError:
            nodes = None
    for node in (ast.walk(ast.parse(text)) if nodes is None else nodes):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("foldwise"):
                    names.add(alias.name)
        elif isinstance(node, ast.ImportFrom):
            if node.level:  # ``from .x import y`` / ``from ..x import y`` inside the package
                if package is None:
                    continue
                parts = package.split(".")
                parts = parts[: len(parts) - (node.level - 1)]
                if not parts:
                    continue
                base = ".".join(parts + ([node.module] if node.module else []))
            elif node.module and node.module.startswith("foldwise"):
                base = node.module
            else:
                continue
            names.add(base)
            for alias in node.names:  # ``from foldwise import glm``
                names.add(f"{base}.{alias.name}")
    return names


def _module_path(name):
    parts = name.split(".")[1:]
    if not parts:
        return _PACKAGE_DIR / "__init__.py"
    candidate = _PACKAGE_DIR.joinpath(*parts).with_suffix(".py")
    if candidate.is_file():
        return candidate
    package_init = _PACKAGE_DIR.joinpath(*parts, "__init__.py")
    return package_init if package_init.is_file() else None


def module_closure(*entry_points):
    """Source files of the package that the given modules or scripts import.

    Parameters
    ----------
    *entry_points : str
        Module names (``"foldwise.glm.estimate"``) or paths to script files.

    Returns
    -------
    list of pathlib.Path
        Sorted source files: the entry points and every ``foldwise`` module
        they reach through imports, transitively.
    """
    pending, seen = [], set()
    for entry in entry_points:
        path = Path(entry) if (os.sep in str(entry) or str(entry).endswith(".py")) else _module_path(entry)
        if path is None or not Path(path).is_file():
            raise ValueError(f"no source file for {entry!r}")
        pending.append(Path(path).resolve())
    while pending:
        path = pending.pop()
        if path in seen:
            continue
        seen.add(path)
        for name in _imported_package_modules(path):
            module_path = _module_path(name)
            if module_path is not None:
                pending.append(module_path.resolve())
    return sorted(seen)


def code_hash(*entry_points):
    """sha256 over the source text of ``module_closure(*entry_points)``.

    Snakemake's code trigger never sees modules a script imports, so each
    rule carries this hash in its params (docs/architecture.md, Narrow keys).
    File names enter relative to the package so the hash is machine-free.
    """
    digest = hashlib.sha256()
    for path in module_closure(*entry_points):
        try:
            label = path.relative_to(_PACKAGE_DIR.parent)
        except ValueError:
            label = Path(path.name)
        digest.update(str(label).encode("utf-8") + b"\0")
        digest.update(path.read_bytes() + b"\0")
    return digest.hexdigest()


def seed_from(study_seed, *identity):
    """A 63-bit seed derived from the study seed and a job's identity.

    Never from time (docs/architecture.md, invariant 2): the same study seed and the same
    identity strings (rule, subject, analysis, ROI, ...) give the same seed.
    """
    text = canonical_json([int(study_seed), [str(part) for part in identity]])
    return int(hashlib.sha256(text.encode("utf-8")).hexdigest()[:16], 16) >> 1
