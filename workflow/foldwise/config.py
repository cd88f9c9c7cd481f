"""Load and validate the study config before any job runs.

The schema (``foldwise/schema.yaml``, package data) is strict: unknown keys, wrong types and
bad choices are errors that name the key path (``analyses[1].classifier``).
Validation fills in every default, nested ones included, so the rest of the
workflow never guesses. Cross-references the schema cannot express (an
analysis naming an unknown ROI, cross-decoding sets whose class labels
differ) are checked here too. YAML is loaded with ``yaml.safe_load`` and no
config value is ever evaluated.
"""

import copy
import difflib
from pathlib import Path

import jsonschema
import yaml

from foldwise.errors import InputError

__all__ = ["SCHEMA_PATH", "load_yaml", "validate", "load_study_config", "key_path"]

SCHEMA_PATH = Path(__file__).resolve().parent / "schema.yaml"  # package data; in a checkout it is config/schema.yaml


def key_path(parts):
    """Render a JSON-schema path (``deque(['analyses', 1, 'kind'])``) as ``analyses[1].kind``."""
    text = ""
    for part in parts:
        text += f"[{part}]" if isinstance(part, int) else (f".{part}" if text else str(part))
    return text or "(top level)"


def load_yaml(path, what="config file"):
    """Load a YAML file safely; a missing or malformed file is an InputError."""
    path = Path(path)
    if not path.is_file():
        raise InputError(path, "file", f"the {what} does not exist", "create it or pass the right path (make study CONFIG=path)")
    try:
        data = yaml.safe_load(path.read_text(encoding="utf-8"))
    except yaml.YAMLError as error:
        mark = getattr(error, "problem_mark", None)
        where = f"line {mark.line + 1}, column {mark.column + 1}" if mark is not None else "YAML syntax"
        problem = getattr(error, "problem", None) or str(error).splitlines()[0]
        if isinstance(error, yaml.constructor.ConstructorError):  # a tag such as !!python/object
            raise InputError(path, where, f"malformed YAML: tag refused ({problem}); a config holds plain values only, never objects",
                             "remove the tag (the word starting with '!') and write a plain value") from None
        raise InputError(path, where, f"malformed YAML ({problem})", "fix the indentation or quoting at that line") from None
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise InputError(path, "(top level)", f"expected a mapping of keys, found {type(data).__name__}", "start the file with keys such as 'dataset:'")
    return data


def _with_defaults(validator_class):
    """A validator class that fills ``default`` values while it validates."""
    validate_properties = validator_class.VALIDATORS["properties"]

    def fill_defaults(validator, properties, instance, schema):
        if isinstance(instance, dict):
            for name, subschema in properties.items():
                if "default" in subschema and name not in instance:
                    instance[name] = copy.deepcopy(subschema["default"])
        yield from validate_properties(validator, properties, instance, schema)

    return jsonschema.validators.extend(validator_class, {"properties": fill_defaults})


_Validator = _with_defaults(jsonschema.Draft202012Validator)


def _describe(error, schema_root):
    """One readable sentence for a schema error, naming the key path."""
    path = key_path(error.absolute_path)
    if error.validator == "additionalProperties":
        allowed = sorted(error.schema.get("properties", {}))
        extra = sorted(set(error.instance) - set(allowed))
        hints = []
        for key in extra:
            close = difflib.get_close_matches(key, allowed, n=1)
            hints.append(f"'{key}'" + (f" (did you mean '{close[0]}'?)" if close else ""))
        return path, f"unknown key {', '.join(hints)}", f"remove or rename it; allowed keys here: {', '.join(allowed)}"
    if error.validator == "type":
        return path, f"expected {error.validator_value}, found {error.instance!r}", f"give {path} a value of type {error.validator_value}"
    if error.validator == "enum":
        return path, f"{error.instance!r} is not one of {error.validator_value}", f"choose one of {', '.join(map(str, error.validator_value))}"
    if error.validator == "required":
        return path, error.message, "add the missing key"
    if error.validator == "oneOf":
        if "voxel_counts" in path:
            return path, f"{error.instance!r} is not a voxel count", "use a whole number of at least 1, or 'all'"
        if path.startswith("rois") and len(error.absolute_path) == 2:
            return path, "an ROI needs exactly one of 'labels', 'image' or 'sphere'", "keep one of the three definitions"
        if path.startswith("analyses") and len(error.absolute_path) == 2:
            return path, "a 'within' analysis needs 'classes', a 'cross' analysis needs 'sets'", "add the key that matches 'kind'"
    if error.validator == "minProperties" and path.endswith(".classes"):
        found = ", ".join(map(str, error.instance)) or "none"
        return path, f"decoding needs at least {error.validator_value} classes, found {len(error.instance)} ({found})", \
            "define two or more classes, each a list of conditions"
    if error.validator in ("minProperties", "minItems", "maxProperties", "maxItems"):
        bound = "at least" if error.validator.startswith("min") else "at most"
        entries = f"{bound} {error.validator_value} {'entry' if error.validator_value == 1 else 'entries'}"
        return path, f"needs {entries}, found {len(error.instance)}", f"give {path} {entries}"
    if error.validator in ("minimum", "exclusiveMinimum", "maximum", "exclusiveMaximum"):
        return path, f"{error.instance!r} is out of range ({error.validator} {error.validator_value})", f"give {path} a value within the range"
    return path, error.message, f"correct {path} (see the README's config reference)"


#: Keys renamed in this release: old dotted key -> (new dotted key, {old value: new value}). A config with an old
#: key is refused with the new name, so no study silently falls back to a default.
RENAMED_KEYS = {
    "glm.noise_model": ("glm.serial_correlation", {"ols": "ignore", "ar1": "ar1_whiten"}),
    "glm.oversampling": ("glm.hrf_steps_per_scan", {}),
}


def _check_renamed(config, path):
    for old, (new, values) in RENAMED_KEYS.items():
        section, key = old.split(".", 1)
        node = config.get(section) if isinstance(config, dict) else None
        if isinstance(node, dict) and key in node:
            value = node[key]
            written = f"{new.split('.', 1)[1]}: {values.get(value, value)}" if isinstance(value, (str, int)) else new
            mapping = "; ".join(f"{before} is now {after}" for before, after in values.items())
            raise InputError(path, old, f"renamed to {new}" + (f" ({mapping})" if mapping else ""),
                             f"write {written} under {section}: instead")


def validate(config, path="config/config.yaml", schema_path=SCHEMA_PATH):
    """Validate a config dict against the schema, fill defaults, check references.

    Parameters
    ----------
    config : dict
        The parsed config; it is not modified (a filled copy is returned).
    path : str
        The config file's name, for messages.

    Returns
    -------
    dict
        The config with every default filled in.

    Raises
    ------
    InputError
        On the first problem, naming the key path and the fix.
    """
    schema = yaml.safe_load(Path(schema_path).read_text(encoding="utf-8"))
    where, key = _first_non_text_key(config)
    if where is not None:
        written = "null" if key is None else str(key).lower() if isinstance(key, bool) else str(key)
        raise InputError(path, where, f"the key {written} is not text (YAML reads unquoted numbers, true/false and null as values)",
                         f"quote the key ('{written}':) or rename it")
    _check_renamed(config, path)
    filled = copy.deepcopy(config)
    errors = sorted(_Validator(schema).iter_errors(filled), key=lambda e: (len(e.absolute_path), key_path(e.absolute_path)))
    if errors:
        error = jsonschema.exceptions.best_match(errors) if len(errors) > 1 else errors[0]
        field, problem, fix = _describe(error, schema)
        raise InputError(path, field, problem, fix)
    _check_references(filled, path)
    return filled


def _first_non_text_key(node, parts=()):
    """(key path, key) of the first mapping key that is not a string, or (None, None)."""
    if isinstance(node, dict):
        for key, value in node.items():
            if not isinstance(key, str):
                return key_path(parts), key
            found = _first_non_text_key(value, parts + (key,))
            if found[0] is not None:
                return found
    elif isinstance(node, list):
        for index, value in enumerate(node):
            found = _first_non_text_key(value, parts + (index,))
            if found[0] is not None:
                return found
    return None, None


def _check_references(config, path):
    """The checks of meaning the schema cannot express live in the study model, once."""
    from foldwise.study import check_meaning  # late: the study model imports the dataset readers

    check_meaning(config, path)


def load_study_config(path):
    """Load, validate and fill the study config at ``path``."""
    return validate(load_yaml(path), path=str(path))


def apply_overrides(study, arguments, path, configfiles=()):
    """The study config with the command line's ``--config`` entries merged in, validated.

    Snakemake hands every ``--config key=value`` to the workflow; foldwise
    merges them into the study config *before* validation, so an override
    is checked like a file edit, enters the narrow keys of exactly the jobs
    that read it, and is recorded wherever the settings are.

    Parameters
    ----------
    study : dict
        The study config as loaded from ``path`` (not yet validated).
    arguments : list of str
        The raw ``key=value`` entries of ``--config`` (``config_file=...``
        is skipped). ``key={nested: yaml}`` merges into the mapping ``key``
        (mappings merge key by key; lists and values are replaced whole).
        ``set=a.b=1 c[0].d=x`` takes dotted keys, which Snakemake's own
        parser refuses; ``name[index]`` picks an existing list entry.
        Values are read with ``yaml.safe_load``, so ``'"01"'`` stays text.
    path : str
        The config file, for messages.
    configfiles : sequence of path
        Files given with ``--configfile`` (refused: Snakemake's loader
        evaluates YAML templates before foldwise can check anything).

    Returns
    -------
    dict
        The validated config, defaults filled.

    Raises
    ------
    InputError
        For ``--configfile``, an entry that is not ``key=value``, a value
        that is not plain YAML, a dotted key that does not reach into a
        mapping or an existing list entry, or a merged value the schema
        refuses; the message names what was passed and how to write it.
    """
    if configfiles:
        raise InputError("--configfile", "config_file", "the study config was passed with --configfile",
                         "pass it as --config config_file=PATH (read safely by foldwise)")
    usage = ("write --config 'section={key: value}' (nested YAML) or, for dotted keys, "
             "--config 'set=section.key=value other.key=value' (make demo SET='section.key=value')")

    def read_value(text, entry):
        try:
            return yaml.safe_load(text) if text.strip() else None
        except yaml.YAMLError as error:
            problem = getattr(error, "problem", None) or str(error).splitlines()[0]
            raise InputError("--config", entry, f"the value {text!r} is not plain YAML ({problem})", usage) from None

    def parse_dotted(dotted, entry):
        parts = []
        for piece in dotted.split("."):
            name, _, rest = piece.partition("[")
            if not name or not (name.replace("_", "").isalnum()):
                raise InputError("--config", entry, f"the key {dotted!r} is not a dotted key path", usage)
            parts.append(name)
            while rest:
                index, _, rest = rest.partition("]")
                if not index.isdigit() or (rest and not rest.startswith("[")):
                    raise InputError("--config", entry, f"the key {dotted!r} has a list index that is not [number]", usage)
                parts.append(int(index))
                rest = rest[1:]
        return parts

    def merge(base, value):
        if isinstance(base, dict) and isinstance(value, dict):
            merged = dict(base)
            for key, item in value.items():
                merged[key] = merge(base[key], item) if key in base else item
            return merged
        return value

    def set_at(target, parts, value, entry):
        node = target
        for depth, part in enumerate(parts[:-1]):
            following = parts[depth + 1]
            if isinstance(part, int):
                if not isinstance(node, list) or part >= len(node):
                    raise InputError("--config", entry, f"{key_path(parts[:depth + 1])} is not an existing list entry",
                                     "index an entry the config file lists, or pass the whole list: --config 'key=[...]'")
                node = node[part]
                continue
            if not isinstance(node, dict):
                raise InputError("--config", entry, f"{key_path(parts[:depth])} is not a mapping", usage)
            if part not in node:
                node[part] = [] if isinstance(following, int) else {}
            node = node[part]
        last = parts[-1]
        if isinstance(last, int):
            if not isinstance(node, list) or last >= len(node):
                raise InputError("--config", entry, f"{key_path(parts)} is not an existing list entry",
                                 "index an entry the config file lists, or pass the whole list: --config 'key=[...]'")
            node[last] = value
        elif isinstance(node, dict):
            node[last] = merge(node.get(last), value)
        else:
            raise InputError("--config", entry, f"{key_path(parts[:-1])} is not a mapping", usage)

    merged = copy.deepcopy(study)
    passed = []  # (key path, the entry as typed)
    for entry in arguments or ():
        key, equals, text = str(entry).partition("=")
        if not equals:
            raise InputError("--config", entry, f"{entry!r} is not key=value", usage)
        if key == "config_file":
            continue
        if key == "set":
            for item in text.split():
                dotted, equals, item_text = item.partition("=")
                if not equals:
                    raise InputError("--config", entry, f"{item!r} is not dotted.key=value", usage)
                parts = parse_dotted(dotted, entry)
                set_at(merged, parts, read_value(item_text, entry), entry)
                passed.append((key_path(parts), item))
            continue
        parts = parse_dotted(key, entry)
        set_at(merged, parts, read_value(text, entry), entry)
        passed.append((key_path(parts), entry))
    try:
        return validate(merged, path=path)
    except InputError as error:
        for where, typed in passed:
            if error.field == where or error.field.startswith((f"{where}.", f"{where}[")) or where.startswith(f"{error.field}."):
                raise InputError("--config", error.field, f"{error.problem} (passed as {typed!r})", error.fix) from None
        raise
