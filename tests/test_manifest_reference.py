"""The manifest reference page and the commands around it (issue 13): the generated page is the committed one,
it explains every field, statistic, operator, rule and sensitivity; ``manifest diff`` names the fields where two
manifests' canonical forms differ; the former spellings (``type: key``, a bare threshold) are still read with a
note saying what to write instead."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from jointstat.circuit.compile import compile_manifest
from jointstat.circuit.library.registry import BUILT_IN
from jointstat.circuit.library.statistic import RULES
from jointstat.circuit.manifest import (
    ABSENT,
    canonical_differences,
    deprecations,
    load_manifest,
    parse_manifest,
)
from jointstat.circuit.parameters import OPERATOR_WORDS
from jointstat.circuit.reference_page import render
from jointstat.cli import main

ROOT = Path(__file__).resolve().parents[1]
PAGE = ROOT / "docs" / "manifest.md"
JOIN = ROOT / "configs" / "shared-customers" / "manifest.yaml"


def test_the_committed_reference_page_is_the_generated_one() -> None:
    # Fails when a field, a description, a statistic or a rule changes without `jointstat manifest reference`.
    assert PAGE.read_text(encoding="utf-8") == render(), "run: .venv/bin/jointstat manifest reference"


def test_the_page_explains_every_statistic_operator_rule_and_sensitivity() -> None:
    page = render()
    for cls in BUILT_IN:
        assert f"### `{cls.name}`" in page
        assert f"Sensitivity (for noise): {' '.join(cls.sensitivity.split())}." in page
    for op, word in OPERATOR_WORDS.items():
        assert f"| `{op}` |" in page and f"`{word}`" in page
    for rule in RULES:
        assert f"| `{rule}` |" in page
    for phrase in ("`withheld`", "`withheld_by`", "Dwork–Roth 2014", "multiples of 2^-F", "`rounding`"):
        assert phrase in page


def test_the_page_does_not_depend_on_the_plugins_a_process_loaded() -> None:
    before = render()
    load_manifest(ROOT / "configs" / "delivery-spread" / "manifest.yaml")  # registers the custom `spread`
    assert render() == before and "spread" not in before


def test_the_reference_command_writes_the_page_and_its_check_fails_when_it_is_stale(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "manifest.md"
    assert main(["manifest", "reference", "--out", str(out)]) == 0
    assert out.read_text(encoding="utf-8") == render()
    assert main(["manifest", "reference", "--out", str(out), "--check"]) == 0
    out.write_text(render().replace("at least", "at leest", 1), encoding="utf-8")
    capsys.readouterr()
    assert main(["manifest", "reference", "--out", str(out), "--check"]) == 2
    assert "is out of date: run `jointstat manifest reference" in capsys.readouterr().err
    assert not (tmp_path / "manifest.md.tmp").exists()


# -- manifest diff ---------------------------------------------------------------------------------------------


def write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_diff_of_two_layouts_of_the_same_manifest_finds_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    text = JOIN.read_text(encoding="utf-8")
    relaid = "# the same job, written differently\n" + text.replace(
        "{name: Northfield Grocers}", "\n    name: Northfield Grocers"
    )
    a, b = write(tmp_path, "a.yaml", text), write(tmp_path, "b.yaml", relaid)
    assert canonical_differences(load_manifest(a), load_manifest(b)) == []
    assert main(["manifest", "diff", str(a), str(b)]) == 0
    assert "have the same digest" in capsys.readouterr().out


def test_diff_names_each_differing_field_with_both_values(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    text = JOIN.read_text(encoding="utf-8")
    other = text.replace("min_count: 3", "min_count: 5").replace(
        "capacity: 16\n    columns:\n      - {name: email, type: identifier, width: 48, fold_case: true}\n  evaluator",
        "capacity: 20\n    columns:\n      - {name: email, type: identifier, width: 48, fold_case: true}\n  evaluator",
    )
    other = other.replace("version: 1", "version: 1\n  description: the March run")
    a, b = write(tmp_path, "a.yaml", text), write(tmp_path, "b.yaml", other)
    found = canonical_differences(load_manifest(a), load_manifest(b))
    assert found == [
        ("disclosure.min_count", 3, 5),
        ("job.description", None, "the March run"),
        ("tables.garbler.capacity", 16, 20),
    ]
    assert main(["manifest", "diff", str(a), str(b)]) == 1
    out = capsys.readouterr().out
    assert "3 fields differ" in out and "  tables.garbler.capacity: 16 | 20" in out
    assert '  job.description: null | "the March run"' in out
    assert main(["manifest", "diff", str(a), str(b), "--json"]) == 1
    figures = json.loads(capsys.readouterr().out)
    assert figures["same_digest"] is False and figures["differences"][0] == {
        "field": "disclosure.min_count",
        "a": 3,
        "b": 5,
    }


def test_diff_tells_an_absent_field_from_a_null_one(tmp_path: Path) -> None:
    text = JOIN.read_text(encoding="utf-8")
    rounded = text.replace(", rounding: nearest}", "}")
    found = canonical_differences(load_manifest(write(tmp_path, "a.yaml", text)), parse_manifest(rounded))
    assert found == [("tables.evaluator.columns[1].rounding", "nearest", ABSENT)]
    assert repr(ABSENT) == "(absent)"


def test_a_bad_manifest_in_a_diff_is_reported_with_its_field_path(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    bad = write(
        tmp_path, "bad.yaml", JOIN.read_text(encoding="utf-8").replace("min_count: 3", "min_count: -1")
    )
    assert main(["manifest", "diff", str(JOIN), str(bad)]) == 2
    assert "disclosure.min_count" in capsys.readouterr().err


# -- clearer names, former spellings -------------------------------------------------------------------------------


def test_the_former_key_type_and_bare_threshold_are_read_with_a_note_and_kept_as_written() -> None:
    current = (ROOT / "configs" / "demo" / "manifest.yaml").read_text(encoding="utf-8")
    former_text = (
        current.replace("type: identifier", "type: key")
        .replace('threshold: {op: ">=", value: 10}', "threshold: 10")
        .replace("at_least]", "above]")
    )
    assert (
        former_text.count("type: key") == 2 and "threshold: 10\n" in former_text and "above]" in former_text
    )
    # The demo as it was written before the operators and identifier columns:
    demo = parse_manifest(former_text)
    notes = [str(n) for n in deprecations(demo)]
    assert any(n.startswith("tables.garbler.columns[0].type: 'key' is the former name") for n in notes)
    assert any(n.startswith("statistic.threshold: a bare number counts values at least 10") for n in notes)
    assert json.loads(demo.canonical())["tables"]["garbler"]["columns"][0]["type"] == "key"  # kept as written
    assert "above" in compile_manifest(demo).statistic.output_specs()
    assert deprecations(load_manifest(JOIN)) == []


def test_an_identifier_column_and_a_former_key_column_read_the_same_but_are_different_agreements() -> None:
    text = JOIN.read_text(encoding="utf-8")
    a, b = parse_manifest(text), parse_manifest(text.replace("type: identifier", "type: key"))
    assert compile_manifest(a).inputs == compile_manifest(b).inputs
    assert [p for p, _, _ in canonical_differences(a, b)] == [
        "tables.evaluator.columns[0].type",
        "tables.garbler.columns[0].type",
    ]
