"""False key matches: hashed identifiers of w bits can collide across the two tables, and the manifest bounds that.

Specification: at full capacity the expected number of false matches is n_g·n_e/2^w (each of the n_g·n_e pairs of
one identifier from each table collides with probability 2^-w); ``manifest check`` and ``plan`` print it; a
manifest whose expectation is above its bound (``matching.max_false_matches``, default 10^-6, part of the manifest
and so of its digest, which both nodes compare) is refused with the smallest key width that meets the bound.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import yaml
from hypothesis import given
from hypothesis import strategies as st
from jointstat.circuit.agreement import DEFAULT_MAX_FALSE_MATCHES
from jointstat.circuit.compile import compile_manifest
from jointstat.circuit.manifest import (
    ManifestError,
    expected_false_matches,
    key_matching,
    parse_manifest,
    width_for_false_matches,
)
from jointstat.cli import main

ROOT = Path(__file__).resolve().parents[1]
JOIN = ROOT / "configs" / "shared-customers" / "manifest.yaml"


def join_manifest(capacity: int, width: int, bound: object = None) -> dict:
    data = yaml.safe_load(JOIN.read_text(encoding="utf-8"))
    for role in ("garbler", "evaluator"):
        data["tables"][role]["capacity"] = capacity
        data["tables"][role]["columns"][0]["width"] = width
    if bound is not None:
        data["matching"] = {"max_false_matches": bound}
    return data


def parse(data: dict):  # type: ignore[no-untyped-def]
    return parse_manifest(yaml.safe_dump(data, sort_keys=False), "m.yaml")


def test_the_expected_false_matches_are_the_pairs_over_two_to_the_width() -> None:
    # n_g·n_e/2^w worked by hand (powers of two, so exact): the figure, 2^20 rows each at 32 bits, is 256.
    assert expected_false_matches(2**20, 2**20, 32) == 256.0
    assert expected_false_matches(2**16, 2**16, 32) == 1.0
    assert expected_false_matches(16, 16, 48) == 2.0**-40
    assert DEFAULT_MAX_FALSE_MATCHES == 1e-6


def test_the_width_that_meets_a_bound_is_the_smallest_one_that_does() -> None:
    # 2^40 / 2^w <= 10^-6 needs 2^w >= 2^40·10^6 ≈ 2^59.93, so 60 bits (worked by hand).
    assert width_for_false_matches(2**20, 2**20, 1e-6) == 60
    assert width_for_false_matches(16, 16, 1e-6) == 28  # 256 / 2^28 ≈ 9.5e-7; 256 / 2^27 ≈ 1.9e-6
    assert width_for_false_matches(2**20, 2**20, 1e-12) is None  # 64 bits give 2^-24 ≈ 6e-8
    assert width_for_false_matches(1, 1, 1.0) == 16  # never below the narrowest key width


@given(st.integers(1, 2**20), st.integers(1, 2**20), st.floats(1e-12, 10.0))
def test_the_width_found_meets_the_bound_and_one_bit_less_would_not(n_g: int, n_e: int, bound: float) -> None:
    width = width_for_false_matches(n_g, n_e, bound)
    if width is None:
        assert expected_false_matches(n_g, n_e, 64) > bound
        return
    assert expected_false_matches(n_g, n_e, width) <= bound
    assert width == 16 or expected_false_matches(n_g, n_e, width - 1) > bound


def test_a_manifest_above_the_bound_is_refused_with_the_width_that_meets_it() -> None:
    with pytest.raises(ManifestError) as info:
        parse(join_manifest(2**20, 32))
    (problem,) = [str(p) for p in info.value.problems]
    assert problem.startswith("matching.max_false_matches: ")
    assert "about 256 false matches" in problem and "32-bit" in problem
    assert "above the agreed bound of 1e-06" in problem and "60 bits or more meet it" in problem


def test_a_bound_no_width_can_meet_is_refused_saying_so() -> None:
    with pytest.raises(ManifestError, match="no key width up to 64 bits meets it"):
        parse(join_manifest(2**20, 64, 1e-12))


def test_the_parties_may_agree_another_bound_in_the_manifest_and_it_changes_the_digest() -> None:
    loose = parse(join_manifest(2**10, 32, 1e-3))  # 2^20 / 2^32 ≈ 2.4e-4, within 10^-3
    figures = key_matching(loose)
    assert figures is not None
    assert (figures.width, figures.garbler_rows, figures.evaluator_rows) == (32, 2**10, 2**10)
    assert figures.expected == 2.0**-12 and figures.bound == 1e-3 and figures.width_needed == 30
    # YAML 1.1 reads 1e-3 (no dot) as text: it is taken as the number it spells.
    assert parse(join_manifest(2**10, 32, "1e-3")).matching.max_false_matches == 1e-3
    small = join_manifest(16, 48)
    digests = {compile_manifest(parse(small)).digest}
    small["matching"] = {"max_false_matches": 1e-9}
    digests.add(compile_manifest(parse(small)).digest)
    assert len(digests) == 2


@pytest.mark.parametrize("bound", [0, -1.0, "many", True, float("inf")])
def test_a_bound_that_is_not_a_positive_number_is_refused(bound: object) -> None:
    with pytest.raises(ManifestError, match=r"matching\.max_false_matches: "):
        parse(join_manifest(16, 48, bound))


def test_a_statistic_that_matches_no_keys_has_no_false_match_figures() -> None:
    manifest = parse_manifest(
        (ROOT / "configs" / "pooled-wait-times" / "manifest.yaml").read_text(), "p.yaml"
    )
    assert key_matching(manifest) is None


def test_manifest_check_and_plan_print_the_expected_false_matches(
    capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    assert main(["manifest", "check", str(JOIN)]) == 0
    out = capsys.readouterr().out
    assert (
        "false key matches: about 9.1e-13 expected at full capacity (16 × 16 rows, 48-bit key hashes;" in out
    )
    assert "agreed bound 1e-06" in out
    from jointstat.bench import garble as garble_bench
    from jointstat.circuit.plan import Speed

    monkeypatch.setattr(garble_bench, "measured_speed", lambda: Speed(1e6, 2e6))
    assert main(["plan", str(JOIN)]) == 0
    assert "false key matches" in capsys.readouterr().out
    assert main(["plan", str(JOIN), "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    assert figures["expected_false_matches"] == 16 * 16 / 2.0**48
    assert figures["max_false_matches"] == 1e-6
