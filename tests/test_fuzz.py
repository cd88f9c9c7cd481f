"""Fuzzing the two front doors users write by hand: the study config and the events tables.

Hypothesis mutates the demo config (random keys, types, values, deletions,
renames) and builds events tables cell by cell (numbers, words, n/a, empty
cells, quotes, stray tabs, odd encodings). Every example must either pass or
raise ``foldwise.errors.InputError`` -- never another exception, which would
reach the user as a traceback.

The budget is fixed and the examples are derandomised, so CI runs the same
examples every time (Hypothesis settings ``max_examples`` and ``derandomize``,
documented at https://hypothesis.readthedocs.io/en/latest/reference/api.html#settings).
"""

import copy
import math

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from foldwise.data.bids import read_events
from foldwise.config import validate
from foldwise.errors import InputError
from foldwise.plan import plan_study
from workflow_support import REPO

DEMO_CONFIG = yaml.safe_load((REPO / "config" / "config.yaml").read_text(encoding="utf-8"))
EXAMPLES_PER_PROPERTY = 300
FUZZ = settings(max_examples=EXAMPLES_PER_PROPERTY, derandomize=True, deadline=None, database=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])

# -- config mutations ----------------------------------------------------------------------
# Words the schema knows, so mutations often land on valid-looking but wrong values.
_KNOWN_WORDS = ["all", "within", "cross", "demo", "bids", "ember", "glow", "hush", "shape", "seen_round", "heard_star",
                "linear_svm", "signal", "none", "leave_one_run_out", "run_groups", "ar1", "lss", "t", "sub-01", "01",
                "{subject}", "{subject.__class__}", "{run!r}", "{", "", " ", "ünïcode", "a" * 300]
_scalars = st.one_of(
    st.none(), st.booleans(), st.integers(min_value=-10, max_value=10), st.integers(), st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from(_KNOWN_WORDS), st.text(max_size=12))
_keys = st.one_of(st.sampled_from(["name", "kind", "classes", "sets", "rois", "labels", "voxel_counts", "n_permutations",
                                   "classifier", "folds", "source", "subjects", "seed", "clasifier", "Name", ""]),
                  st.text(max_size=8), st.integers(min_value=-3, max_value=3), st.booleans(), st.none())
_values = st.recursive(_scalars, lambda children: st.one_of(st.lists(children, max_size=4),
                                                             st.dictionaries(_keys, children, max_size=4)), max_leaves=8)


def _containers(node, path=()):
    """Every (path, container) pair inside a parsed config, the root included."""
    found = [(path, node)]
    if isinstance(node, dict):
        for key, value in node.items():
            found += _containers(value, path + (key,))
    elif isinstance(node, list):
        for index, value in enumerate(node):
            found += _containers(value, path + (index,))
    return [(p, n) for p, n in found if isinstance(n, (dict, list))]


def _mutate_once(config, data):
    """Apply one random edit to ``config`` in place: delete, replace, add, rename or retype an entry."""
    path, container = data.draw(st.sampled_from(_containers(config)), label="where")
    slots = list(container) if isinstance(container, dict) else list(range(len(container)))
    operation = data.draw(st.sampled_from(["delete", "replace", "add", "rename", "wrap", "unwrap"] if slots else ["add"]),
                          label="operation")
    if operation == "add":
        if isinstance(container, dict):
            container[data.draw(_keys, label="new key")] = data.draw(_values, label="new value")
        else:
            container.append(data.draw(_values, label="new item"))
        return
    slot = data.draw(st.sampled_from(slots), label="slot")
    if operation == "delete":
        del container[slot]
    elif operation == "replace":
        container[slot] = data.draw(_values, label="value")
    elif operation == "rename" and isinstance(container, dict):
        container[data.draw(_keys, label="renamed to")] = container.pop(slot)
    elif operation == "wrap":
        container[slot] = [container[slot]]
    elif operation == "unwrap" and isinstance(container[slot], (list, dict)) and container[slot]:
        inner = container[slot]
        container[slot] = inner[0] if isinstance(inner, list) else next(iter(inner.values()))


@st.composite
def mutated_configs(draw):
    config = copy.deepcopy(DEMO_CONFIG)
    data = draw(st.data())
    for _ in range(draw(st.integers(min_value=1, max_value=4), label="number of edits")):
        _mutate_once(config, data)
    return config


_config_outcomes = {"valid": 0, "input_error": 0}


@FUZZ
@given(config=mutated_configs())
def test_mutated_configs_are_accepted_or_refused_with_an_input_error(config):
    try:
        study = validate(config, path="config/study.yaml")
        plan_study(study)  # what workflow/rules/common.smk does next with a valid config
    except InputError as error:
        _config_outcomes["input_error"] += 1
        assert error.field and error.problem and error.fix, str(error)
    else:
        _config_outcomes["valid"] += 1


def test_config_fuzz_reached_both_outcomes():
    """The mutations are neither all harmless nor all fatal (runs after the property above)."""
    if sum(_config_outcomes.values()) == 0:
        pytest.skip("run together with the config property")
    assert _config_outcomes["valid"] > 0 and _config_outcomes["input_error"] > 0, _config_outcomes


# -- events tables ---------------------------------------------------------------------------
_EVENT_COLUMNS = ["onset", "duration", "trial_type", "response_time", "value", "onset", "", "Onset", " duration"]
_CONDITIONS = ["seen_round", "seen_square", "seen_star", "heard_round", "heard_square", "heard_star"]
_number_texts = st.one_of(
    st.floats(min_value=-20, max_value=900, allow_nan=False).map(lambda value: f"{value:.3f}"),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(min_value=-10 ** 20, max_value=10 ** 20).map(str),
    st.sampled_from(["1e309", "-0", "0x10", "1,5", " 3 ", "3.", ".5", "+2", "1_000", "nan", "inf", "-inf", "NaN", "NA",
                     "None", "n/a", ""]))
_word_texts = st.one_of(st.sampled_from(_CONDITIONS + ["n/a", "", " ", "N/A", "null", '"quoted"', '"open', "a\tb", "line\nbreak",
                                                       "#comment", "ünï", "\ufeffonset", "3"]),
                        st.text(max_size=6))
_any_cell = st.one_of(_number_texts, _word_texts)


def _seconds(low, high):
    return st.floats(min_value=low, max_value=high, allow_nan=False).map(lambda value: f"{value:.3f}")


def _good_cell(column, scan_end_s):
    """A cell that a careful user would write in this column of a run lasting ``scan_end_s``."""
    name = column.strip().lower()
    if name == "onset":
        return _seconds(-4.0, max(scan_end_s - 0.01, -4.0))
    if name in ("duration", "response_time"):
        return st.one_of(_seconds(0.0, 30.0), st.sampled_from(["0", "n/a", "2"]))
    return st.one_of(st.sampled_from(_CONDITIONS), st.sampled_from(_CONDITIONS), st.sampled_from(["n/a", ""]))


@st.composite
def events_runs(draw):
    """(file bytes, what the file is, n_scans, tr_s): a clean table, one with a single fault, or anything at all."""
    n_scans = draw(st.integers(min_value=1, max_value=400), label="n_scans")
    valid_tr = draw(st.sampled_from([True] * 9 + [False]), label="valid TR")  # the table, not the TR, is under test
    tr_s = draw(st.floats(min_value=0.3, max_value=4.0) if valid_tr else st.sampled_from([0.0, -2.0, math.nan, math.inf]),
                label="tr_s")
    scan_end_s = n_scans * tr_s if valid_tr else 100.0
    quality = draw(st.sampled_from(["clean", "clean", "one fault", "one fault", "anything"]), label="quality")
    columns = draw(st.lists(st.sampled_from(_EVENT_COLUMNS), min_size=0, max_size=3), label="extra columns")
    if quality != "anything" or draw(st.booleans(), label="usual columns first"):
        columns = ["onset", "duration", "trial_type"] + columns
    n_rows = draw(st.integers(min_value=0 if quality == "anything" else 1, max_value=6), label="rows")
    rows = [[draw(_any_cell if quality == "anything" else _good_cell(column, scan_end_s)) for column in columns]
            for _ in range(n_rows)]
    if quality == "one fault":
        fault = draw(st.sampled_from(["cell", "short row", "long row", "every row long"]), label="fault")
        row = draw(st.integers(min_value=0, max_value=len(rows) - 1), label="faulty row")
        if fault == "cell":
            rows[row][draw(st.integers(min_value=0, max_value=len(columns) - 1))] = draw(_any_cell)
        elif fault == "short row":
            rows[row] = rows[row][: draw(st.integers(min_value=0, max_value=len(columns) - 1))]
        else:  # one cell too many: a stray leading number or a trailing tab
            leading = draw(st.booleans(), label="leading extra cell")
            for index in (range(len(rows)) if fault == "every row long" else [row]):
                rows[index].insert(0 if leading else len(rows[index]), draw(_number_texts) if leading else "")
    ending = draw(st.sampled_from(["\n", "", "\n\n", "\r\n"]), label="ending")
    text = "\n".join("\t".join(cells) for cells in [columns] + rows) + ending
    encoding = draw(st.sampled_from(["utf-8"] * 5 + ["utf-8-sig", "latin-1", "utf-16"]), label="encoding")
    plain = (encoding in ("utf-8", "utf-8-sig") and ending != "\r\n" and len(set(columns)) == len(columns)
             and all(len(row) == len(columns) for row in rows)
             and not any(mark in cell for row in [columns] + rows for cell in row for mark in ('"', "\t", "\n", "\r", "#", "\ufeff")))
    # A row with more cells than the header must be refused, unless the extra cells are empty (a trailing tab)
    # (no quotes, so every tab separates cells).
    lines = [line.removesuffix("\r").split("\t") for line in text.split("\n") if line]
    too_long = bool(lines) and '"' not in text and encoding in ("utf-8", "utf-8-sig") and any(
        any(cell != "" for cell in cells[len(lines[0]):]) for cells in lines[1:])
    shape = {"quality": quality, "plain": (columns, rows) if plain else None, "too_long": too_long}
    return text.encode(encoding, errors="replace"), shape, n_scans, tr_s


def _expected_events(columns, rows):
    """What a plain table (one cell per column, nothing quoted) must read as: the labelled rows, in order.

    An independent reading of the events rules: ``trial_type`` empty or ``n/a``
    drops the row; ``n/a`` duration is 0 s; everything else is a number.
    """
    at = {name: index for index, name in enumerate(columns)}
    expected = []
    for row in rows:
        trial_type = row[at["trial_type"]].strip()
        if trial_type in ("", "n/a"):
            continue
        duration = row[at["duration"]].strip()
        expected.append((float(row[at["onset"]].strip()), 0.0 if duration == "n/a" else float(duration), trial_type))
    return expected


_events_outcomes = {"read": 0, "input_error": 0, "checked against the cells": 0}


@pytest.fixture(scope="module")
def events_folder(tmp_path_factory):
    return tmp_path_factory.mktemp("fuzz-events")


@FUZZ
@given(run=events_runs())
def test_generated_events_tables_are_read_or_refused_with_an_input_error(events_folder, run):
    content, shape, n_scans, tr_s = run
    path = events_folder / "sub-01_task-lanterns_run-01_events.tsv"
    path.write_bytes(content)
    try:
        events = read_events(path, n_scans, tr_s)
    except InputError as error:
        _events_outcomes["input_error"] += 1
        assert str(error).startswith(f"{path}: ") and ". Fix: " in str(error)
    else:
        _events_outcomes["read"] += 1
        assert not shape["too_long"], "a row with more cells than the header was read"
        assert list(events.columns) == ["onset", "duration", "trial_type"] and len(events) >= 1
        assert events["onset"].map(math.isfinite).all() and (events["duration"] >= 0).all()
        assert (events["onset"] < n_scans * tr_s).all()
        if shape["plain"] is not None:
            _events_outcomes["checked against the cells"] += 1
            assert list(events.itertuples(index=False, name=None)) == _expected_events(*shape["plain"])


def test_events_fuzz_reached_every_outcome():
    """Some generated tables are read (and checked cell by cell), some refused (runs after the property above)."""
    if sum(_events_outcomes.values()) == 0:
        pytest.skip("run together with the events property")
    assert min(_events_outcomes.values()) > 0, _events_outcomes
