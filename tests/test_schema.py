"""The JSON Schemas of the four --json documents (``panel-audit schema``, ``auditor.commands.schema``).

The oracle is the jsonschema package's draft 2020-12 validator (an independent
implementation of the standard): it checks the schemas themselves (``check_schema``), every
document the suite produces (recorded by tests/conftest.py, judged by the last test of the
run), and that mutated documents (a field renamed, a number written as text) fail, so that
a schema accepting anything cannot pass.
"""

from __future__ import annotations

import json
import subprocess
import sys
from collections.abc import Iterator
from typing import Any

import polars as pl
import pytest
from conftest import DOCUMENTS, ROOT, SCHEMA_COMMANDS, SESSION, run_cli
from jsonschema import Draft202012Validator

from auditor.checks.explain import EXPLANATIONS
from auditor.checks.findings import CHECKS
from auditor.commands.schema import DIALECT, NAMES, schema

EXAMPLES = ROOT / "examples"
KEYS = ("--unit", "orchard_id", "--time", "season")
REGRESSORS = "rainfall_mm,irrigation_h,labour_days,altitude_m,soil_class,founder_training_yrs"


def _validator(name: str) -> Draft202012Validator:
    return Draft202012Validator(schema(name))


@pytest.fixture(scope="module")
def documents(tmp_path_factory) -> dict[str, dict[str, Any]]:
    """One document of each command on the invented orchard registry, from the command line
    (also recorded for the suite-wide test), plus a compare whose new wave changes a type."""
    folder = tmp_path_factory.mktemp("schema")
    base, new = str(EXAMPLES / "orchards.csv"), str(EXAMPLES / "orchards_next_season.csv")
    contract = folder / "contract.yaml"
    assert run_cli("rules", "draft", base, *KEYS, "--out", str(contract)).returncode == 0
    runs = {
        "profile": run_cli("profile", base, *KEYS, "--json"),
        "instruments": run_cli("instruments", base, *KEYS, "--json", "--outcome", "log_yield_ha",
                               "--regressors", REGRESSORS, "--correlated", "labour_days,founder_training_yrs",
                               "--treat-as-invariant", "founder_training_yrs", "--period-effects"),
        "compare": run_cli("compare", base, new, *KEYS, "--json", "--merged"),
        "check": run_cli("check", new, "--rules", str(contract), "--against", base, "--json"),
    }
    out = {}
    for name, proc in runs.items():
        assert proc.returncode in (0, 1), (name, proc.stderr)
        out[name] = json.loads(proc.stdout)
    from auditor.commands.compare import compare

    retyped = folder / "retyped.csv"
    frame = pl.read_csv(new).with_columns(pl.col("rainfall_mm").cast(pl.String))
    frame.with_columns(pl.when(pl.int_range(pl.len()) == 0).then(pl.lit("n/a")).otherwise(pl.col("rainfall_mm"))
                       .alias("rainfall_mm")).write_csv(retyped)
    out["compare-retyped"] = compare(base, str(retyped), unit="orchard_id", time="season").to_dict()
    return out


# --------------------------------------------------------------------------- the schemas


def _nodes(node: dict[str, Any], where: str) -> Iterator[tuple[str, dict[str, Any]]]:
    """Every subschema of ``node`` with its JSON pointer."""
    yield where, node
    for key in ("properties", "$defs"):
        for name, sub in node.get(key, {}).items():
            yield from _nodes(sub, f"{where}/{key}/{name}")
    for key in ("items", "additionalProperties"):
        if isinstance(node.get(key), dict):
            yield from _nodes(node[key], f"{where}/{key}")
    for key in ("oneOf", "anyOf", "allOf", "prefixItems"):
        for i, sub in enumerate(node.get(key, [])):
            yield from _nodes(sub, f"{where}/{key}/{i}")


@pytest.mark.parametrize("name", NAMES)
def test_schema_is_valid_draft_2020_12(name):
    s = schema(name)
    assert s["$schema"] == DIALECT
    Draft202012Validator.check_schema(s)


@pytest.mark.parametrize("name", NAMES)
def test_every_field_item_and_choice_has_a_description(name):
    missing = [where for where, node in _nodes(schema(name), "#")
               if not isinstance(node.get("description"), str) or not node["description"].strip()]
    assert not missing, missing[:10]


@pytest.mark.parametrize("name", NAMES)
def test_every_object_says_which_keys_it_takes(name):
    # fixed keys: nothing else allowed; keys from the data: a schema for their values
    loose = []
    for where, node in _nodes(schema(name), "#"):
        if node.get("type") != "object":
            continue
        extra = node.get("additionalProperties")
        if "properties" in node and extra is not False or "properties" not in node and not isinstance(extra, dict):
            loose.append(where)
    assert not loose, loose


def test_finding_check_enumerates_every_code_with_its_explanation():
    for name in ("profile", "instruments", "compare"):
        check = schema(name)["$defs"]["finding"]["properties"]["check"]
        codes = [option["const"] for option in check["oneOf"]]
        assert sorted(codes) == sorted(CHECKS)
        for option in check["oneOf"]:
            assert EXPLANATIONS[option["const"]].meaning in option["description"]


def test_finding_count_says_what_explain_says_it_counts():
    count = schema("profile")["$defs"]["finding"]["properties"]["count"]["description"]
    for code, e in EXPLANATIONS.items():
        expected = code if e.count == "not used" else f"{code}: {e.count}"
        assert expected in count, code


def test_schema_returns_a_fresh_copy():
    s = schema("check")
    s["properties"].clear()
    assert schema("check")["properties"]


def test_cli_prints_the_schema_and_refuses_an_unknown_name():
    run = run_cli("schema", "compare")
    assert run.returncode == 0 and run.stderr == ""
    assert json.loads(run.stdout) == schema("compare")
    bad = run_cli("schema", "report")
    assert bad.returncode == 2 and bad.stdout == ""
    assert bad.stderr == ("panel-audit: error: no schema named 'report'; choose one of: "
                          "profile, instruments, compare, check\n")


def test_schema_command_loads_no_heavy_library():
    # python -X importtime lists every module the run imports, one line each, on stderr
    run = subprocess.run([sys.executable, "-X", "importtime", "-m", "auditor.cli", "schema", "instruments"],
                         capture_output=True, text=True, cwd=ROOT, timeout=60)
    assert run.returncode == 0 and json.loads(run.stdout) == schema("instruments")
    loaded = {line.rsplit("|", 1)[-1].strip() for line in run.stderr.splitlines() if line.startswith("import time:")}
    assert "auditor.commands.schema" in loaded
    assert not loaded & {"polars", "numpy", "pandas", "scipy", "matplotlib", "great_expectations"}


# --------------------------------------------------------------------------- documents


@pytest.mark.parametrize("name", ["profile", "instruments", "compare", "check", "compare-retyped"])
def test_orchard_document_matches_its_schema(documents, name):
    errors = [f"{e.json_path}: {e.message}" for e in _validator(name.split("-")[0]).iter_errors(documents[name])]
    assert not errors, errors[:5]


def test_the_orchard_documents_reach_the_optional_parts(documents):
    # the mutation tests below only mean something where the documents hold these parts
    assert documents["compare"]["merged"] is not None
    assert documents["check"]["against"] is not None
    assert any(r["across_waves"] for r in documents["check"]["rules"])
    assert documents["compare-retyped"]["schema"]["type_changed"]
    assert documents["instruments"]["estimates"]["hausman_taylor"] is not None
    assert documents["instruments"]["strength"]


# Objects whose keys come from the data (any key is fine), and values that may be a number
# or text (period labels; example values): the mutation tests leave those alone.
FREE_KEYS = {"coef", "se", "se_cluster"}
LABEL_LISTS = {"period_values", "missing_periods", "base", "new", "overlap"}


def _mutable(doc: Any, path: tuple[Any, ...] = ()) -> Iterator[tuple[tuple[Any, ...], Any]]:
    """(path, container) for every dict and list outside examples, depth first; of a list
    the first few items only (their siblings share their schema)."""
    if isinstance(doc, dict | list):
        yield path, doc
        items = doc.items() if isinstance(doc, dict) else enumerate(doc[:4])
        for k, v in items:
            if k != "examples":
                yield from _mutable(v, (*path, k))


def _named(path: tuple[Any, ...]) -> list[str]:
    return [p for p in path if isinstance(p, str)]


@pytest.mark.parametrize("name", ["profile", "instruments", "compare", "check", "compare-retyped"])
def test_a_renamed_field_fails_validation(documents, name):
    doc = json.loads(json.dumps(documents[name]))
    validator = _validator(name.split("-")[0])
    accepted = []
    for path, node in _mutable(doc):
        if not isinstance(node, dict) or (_named(path) and _named(path)[-1] in FREE_KEYS):
            continue
        for key in list(node):
            node[f"{key}_renamed"] = node.pop(key)
            if validator.is_valid(doc):
                accepted.append((*path, key))
            node[key] = node.pop(f"{key}_renamed")
    assert validator.is_valid(doc)
    assert not accepted, accepted[:10]


@pytest.mark.parametrize("name", ["profile", "instruments", "compare", "check", "compare-retyped"])
def test_a_number_written_as_text_fails_validation(documents, name):
    doc = json.loads(json.dumps(documents[name]))
    validator = _validator(name.split("-")[0])
    accepted, tried = [], 0
    for path, node in _mutable(doc):
        if isinstance(node, list) and "missing_periods" in path or set(_named(path)[-1:]) & LABEL_LISTS:
            continue  # a list of period labels
        items = list(node.items()) if isinstance(node, dict) else list(enumerate(node))
        for k, v in items:
            if isinstance(v, bool) or not isinstance(v, int | float) or k == "period":
                continue
            tried += 1
            node[k] = str(v)
            if validator.is_valid(doc):
                accepted.append((*path, k))
            node[k] = v
    assert tried >= 5
    assert not accepted, accepted[:10]


# --------------------------------------------------------------------------- the whole suite


def test_every_recorded_document_matches_its_schema():
    # Runs last (tests/conftest.py): every document any test produced, in process (to_dict of the
    # four result types) or as a CLI's --json output.
    if not any(DOCUMENTS.values()):
        pytest.skip("no document was recorded in this run")
    failures = []
    for name in SCHEMA_COMMANDS:
        validator = _validator(name)
        for text, (test, via) in DOCUMENTS[name].items():
            error = next(iter(validator.iter_errors(json.loads(text))), None)
            if error is not None:
                failures.append(f"{name} document from {test} ({via}): {error.json_path}: {error.message[:200]}")
    assert not failures, f"{len(failures)} documents do not match their schema:\n" + "\n".join(failures[:10])
    if SESSION["full_suite"]:
        assert all(DOCUMENTS[name] for name in SCHEMA_COMMANDS), {n: len(d) for n, d in DOCUMENTS.items()}
        from_cli = {name for name, docs in DOCUMENTS.items() for _, via in docs.values() if via == "command line"}
        assert from_cli == set(SCHEMA_COMMANDS), from_cli


def test_a_to_dict_call_is_recorded():
    # the recorder itself (the CLI path is judged by the test above on a full run)
    from auditor.commands.profile import profile

    before = len(DOCUMENTS["profile"])
    frame = pl.DataFrame({"u": [1, 1, 2, 2], "t": [1, 2, 1, 2], "x": [0.5, 1.5, 2.0, 7.25]})
    profile(frame, unit="u", time="t").to_dict()
    assert len(DOCUMENTS["profile"]) == before + 1
    assert list(DOCUMENTS["profile"].values())[-1][1] == "to_dict"

