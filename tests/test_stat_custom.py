"""Custom statistics registered from Python, and every example in configs/ run on its CSV files: on the plain
backend, garbled in one process with exactly one table per AND gate the count backend counts, and against numpy
and the statistics module computed from the same CSV files."""

from __future__ import annotations

import json
import statistics
from pathlib import Path
from typing import Literal

import numpy as np
import pytest
from jointstat.circuit.compile import CompiledStatistic, compile_manifest
from jointstat.circuit.inputs import Records, read_csv
from jointstat.circuit.library import blocks
from jointstat.circuit.library.registry import register_statistic, registered
from jointstat.circuit.library.statistic import (
    BuildContext,
    OutputSpec,
    Statistic,
    StatisticResult,
    TableNeeds,
)
from jointstat.circuit.manifest import load_manifest
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import StatisticParameters
from jointstat.cli import main
from jointstat.problems import Problem

from tests.test_stat_support import (
    SECRET,
    TABLE_BYTES_PER_AND,
    encode,
    garble_locally,
    manifest,
    records,
    run_garbled,
    run_plain,
    table,
)

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = ROOT / "configs"


class WeightedParameters(StatisticParameters):
    name: Literal["test_weighted_total"]
    weight: int


@register_statistic
class WeightedTotal(Statistic[WeightedParameters]):
    """A public weight times the garbler's total plus the evaluator's total (test-only custom statistic)."""

    name = "test_weighted_total"
    Parameters = WeightedParameters

    def problems(self) -> list[Problem]:
        return [] if self.params.weight > 0 else [Problem("statistic.weight", "must be positive")]

    def needs(self) -> dict[Party, TableNeeds]:
        return {p: TableNeeds(("v",)) for p in Party}

    def outputs(self) -> list[OutputSpec]:
        return [OutputSpec("total", 16)]

    def build(self, ctx: BuildContext) -> StatisticResult:
        bld = ctx.builder
        sums = []
        for p in Party:
            t = ctx.table(p)
            sums.append(bld.extend(blocks.tree_sum(bld, bld.and_(t.bits("v"), t.valid[:, None])), 16))
        w = self.params.weight
        weighted = blocks.multiply_full(bld, sums[0], bld.constant_word(w, w.bit_length()))[:16]
        return StatisticResult({"total": bld.add(weighted, sums[1])})


def test_a_custom_statistic_is_used_by_name_from_a_manifest() -> None:
    assert "test_weighted_total" in registered()
    col = {"name": "v", "type": "unsigned", "width": 6}
    c = compile_manifest(
        manifest(
            {"garbler": table(3, col), "evaluator": table(3, col)},
            {"name": "test_weighted_total", "weight": 3},
            {"evaluator": ["total"]},
        )
    )
    got = run_plain(c, records("g", v=[1, 2, 3]), records("e", v=[10, 20]))
    assert got[Party.EVALUATOR] == {"withheld": False, "total": 3 * 6 + 30}
    assert run_garbled(c, records("g", v=[63]), records("e", v=[])) == {
        Party.GARBLER: {},
        Party.EVALUATOR: {"withheld": False, "total": 189},
    }


def test_a_custom_statistics_own_checks_name_their_field() -> None:
    col = {"name": "v", "type": "unsigned", "width": 6}
    with pytest.raises(ValueError, match=r"statistic\.weight: must be positive"):
        manifest(
            {"garbler": table(3, col), "evaluator": table(3, col)},
            {"name": "test_weighted_total", "weight": 0},
            {"evaluator": ["total"]},
        )


EXAMPLES = sorted(path.parent.name for path in CONFIGS.glob("*/manifest.yaml"))


def load_example(folder: str) -> tuple[CompiledStatistic, dict[Party, Records]]:
    m = load_manifest(CONFIGS / folder / "manifest.yaml")
    compiled = compile_manifest(m)
    recs = {}
    for party, name in ((Party.GARBLER, "garbler.csv"), (Party.EVALUATOR, "evaluator.csv")):
        recs[party] = read_csv(
            CONFIGS / folder / name, m.table(party), columns=compiled.inputs[party].columns, key_secret=SECRET
        )
    return compiled, recs


def run_example(folder: str) -> dict[Party, dict[str, object]]:
    """The example on the plain backend; the garbled run must give the same outputs."""
    compiled, recs = load_example(folder)
    plain = run_plain(compiled, recs[Party.GARBLER], recs[Party.EVALUATOR])
    assert run_garbled(compiled, recs[Party.GARBLER], recs[Party.EVALUATOR]) == plain
    return plain


def csv_column(folder: str, party: str, column: str) -> list[str]:
    lines = (CONFIGS / folder / f"{party}.csv").read_text().splitlines()
    idx = lines[0].split(",").index(column)
    return [line.split(",")[idx] for line in lines[1:] if line]


def test_every_example_is_here() -> None:
    assert EXAMPLES == [
        "bike-prices-median",
        "clinic-waits-noisy",
        "dairy-night",
        "default-rate-compare",
        "delivery-spread",
        "demo",
        "pooled-wait-times",
        "rainfall-totals",
        "repair-cafe-visits",
        "shared-customers",
        "volunteer-ages",
    ]


@pytest.mark.parametrize("folder", EXAMPLES)
def test_every_example_garbles_one_table_per_and_gate_the_count_backend_counts(folder: str) -> None:
    compiled, recs = load_example(folder)
    run = garble_locally(compiled, recs[Party.GARBLER], recs[Party.EVALUATOR], chunk_bytes=1 << 14)
    assert run.and_gates == compiled.size().and_gates > 0
    assert run.table_bytes == TABLE_BYTES_PER_AND * compiled.size().and_gates
    plain = compiled.run_plain(encode(compiled, recs[Party.GARBLER], recs[Party.EVALUATOR]))
    for p in Party:
        assert np.array_equal(run.outputs[p], plain[p])


def test_the_custom_spread_example_runs_on_its_csv_files() -> None:
    got = run_example("delivery-spread")
    minutes = [
        int(v)
        for v in csv_column("delivery-spread", "garbler", "minutes")
        + csv_column("delivery-spread", "evaluator", "minutes")
    ]
    assert got[Party.EVALUATOR] == {
        "withheld": False,
        "spread": max(minutes) - min(minutes),
        "count": len(minutes),
    }


def test_the_examples_give_the_figures_computed_in_the_clear() -> None:
    waits = [float(v) for v in csv_column("pooled-wait-times", "garbler", "wait_minutes")] + [
        float(v) for v in csv_column("pooled-wait-times", "evaluator", "wait")
    ]
    got = run_example("pooled-wait-times")[Party.EVALUATOR]
    assert got["count"] == len(waits) and got["sum"] == sum(waits) == float(np.sum(waits))  # numpy.sum
    assert abs(got["mean"] - statistics.mean(waits)) < 2**-8  # statistics.mean, rounded toward zero
    assert abs(got["mean"] - float(np.mean(waits))) < 2**-8  # numpy.mean
    assert abs(got["variance"] - statistics.pvariance(waits)) < 2**-6  # statistics.pvariance
    assert abs(got["variance"] - float(np.var(waits))) < 2**-6  # numpy.var

    rain = [
        float(v)
        for v in csv_column("rainfall-totals", "garbler", "rain_mm")
        + csv_column("rainfall-totals", "evaluator", "rain_mm")
    ]
    assert run_example("rainfall-totals")[Party.GARBLER] == {
        "withheld": False,
        "count": len(rain),
        "sum": sum(rain),
    }
    assert abs(sum(rain) - float(np.sum(rain))) < 1e-9  # numpy.sum

    returning = [
        v in ("yes", "true")
        for v in csv_column("repair-cafe-visits", "garbler", "returning")
        + csv_column("repair-cafe-visits", "evaluator", "returning")
    ]
    assert run_example("repair-cafe-visits")[Party.EVALUATOR] == {
        "withheld": False,
        "count": int(np.count_nonzero(returning)),  # numpy.count_nonzero
    }

    prices = [
        float(v)
        for v in csv_column("bike-prices-median", "garbler", "price")
        + csv_column("bike-prices-median", "evaluator", "sale_price")
    ]
    got = run_example("bike-prices-median")[Party.GARBLER]
    assert got["p50"] == statistics.median(prices)  # statistics.median
    assert got["p50"] == float(np.percentile(prices, 50, method="midpoint"))  # numpy.percentile
    assert got["p90"] == float(np.percentile(prices, 90, method="midpoint"))
    assert got["count"] == len(prices)

    g_mail = {v.lower() for v in csv_column("shared-customers", "garbler", "email")}
    spend = dict(
        zip(
            csv_column("shared-customers", "evaluator", "email"),
            csv_column("shared-customers", "evaluator", "spend"),
            strict=True,
        )
    )
    shared = np.array([float(s) for k, s in spend.items() if k.lower() in g_mail])  # Python sets
    got = run_example("shared-customers")[Party.EVALUATOR]
    assert got["matches"] == len(shared) and abs(got["sum"] - float(shared.sum())) <= 0.25 * len(shared)
    assert got["at_least"] == int((shared >= 200).sum())  # numpy comparison, threshold {op: ">=", value: 200}

    visits = dict(
        zip(
            [v.lower() for v in csv_column("demo", "evaluator", "email")],
            [int(v) for v in csv_column("demo", "evaluator", "visits")],
            strict=True,
        )
    )
    members = {v.lower() for v in csv_column("demo", "garbler", "email")}
    both = np.array([n for k, n in visits.items() if k in members])  # Python sets, fold_case
    got = run_example("demo")
    assert got[Party.GARBLER] == {"withheld": False, "matches": len(both)}
    assert got[Party.EVALUATOR]["matches"] == len(both) and got[Party.EVALUATOR]["sum"] == int(both.sum())
    assert 0 <= float(np.mean(both)) - got[Party.EVALUATOR]["mean"] < 2**-8  # numpy.mean, rounded toward zero
    # numpy comparison, threshold {op: ">=", value: 10}
    assert got[Party.EVALUATOR]["at_least"] == int((both >= 10).sum())

    rates = [
        float(csv_column("default-rate-compare", p, "default_rate")[0]) for p in ("garbler", "evaluator")
    ]
    assert rates[0] > rates[1]
    assert run_example("default-rate-compare")[Party.EVALUATOR] == {"withheld": False, "larger": "garbler"}

    ages = [
        int(v)
        for v in csv_column("volunteer-ages", "garbler", "age")
        + csv_column("volunteer-ages", "evaluator", "age_years")
    ]
    ref, _ = np.histogram(ages, bins=[16, 25, 40, 65, 100])  # numpy.histogram
    got = run_example("volunteer-ages")[Party.EVALUATOR]
    assert got["counts"] == list(ref) and got["count"] == int(ref.sum())


def test_manifest_commands_work_on_every_example(capsys: pytest.CaptureFixture[str]) -> None:
    for path in sorted(CONFIGS.glob("*/manifest.yaml")):
        assert main(["manifest", "check", str(path)]) == 0
        assert main(["manifest", "digest", str(path)]) == 0
        out = capsys.readouterr().out.strip().splitlines()
        assert out[0].startswith(f"{path}: ok") and len(out[-1]) == 64
    assert main(["manifest", "schema"]) == 0
    assert "keyed_join" in json.dumps(json.loads(capsys.readouterr().out))
    assert main(["manifest", "schema", "--plugin", str(CONFIGS / "delivery-spread" / "spread.py")]) == 0
    assert '"spread"' in capsys.readouterr().out
