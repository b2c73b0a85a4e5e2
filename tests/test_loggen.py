"""Tests of the invented-log generator (scripts/loggen.py) and the demo writer (scripts/make_demo_logs.py)."""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import jsonschema
import pytest
import statsmodels.api as sm
from scipy import stats
from scipy.special import expit

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "scripts"))

import loggen  # noqa: E402
import make_demo_logs  # noqa: E402
from loggen import Categorical, Interaction, LogConfig, Multi, Numeric  # noqa: E402

from conftest import assert_one_line  # noqa: E402
from trainer.errors import UserError  # noqa: E402
from trainer.spec import parse_spec  # noqa: E402

MINI = LogConfig(
    name="mini",
    label="y",
    fields=(
        Categorical("big", vocab=2000, zipf=0.9, prefix="b", effect_sd=0.3),
        Categorical("small", labels=("x", "y", "z"), zipf=1.0, effect_sd=0.5),
        Categorical("num_id", vocab=50, zipf=1.2, dtype="int64", effect_sd=0.2, null_rate=0.1),
        Multi("tags", vocab=30, zipf=1.0, lengths=(0.2, 0.3, 0.3, 0.2), prefix="t", null_rate=0.05),
        Numeric("amount", loc=2.0, scale=0.7, coef=0.4, spec={"transform": "log1p"}, null_rate=0.2),
    ),
    interactions=(Interaction(("small", "num_id"), 0.3),),
    base_rate=0.05,
    start_day="2024-01-01",
    bits=16,
)


@pytest.fixture(scope="module")
def mini_file(tmp_path_factory):
    """60k rows of MINI over 3 days in one file, with the true probability column."""
    out = tmp_path_factory.mktemp("mini") / "mini.parquet"
    written = loggen.write_logs(MINI, out, 60_000, days=3, seed=11, chunk_rows=8192, with_truth=True)
    return written, pq.read_table(out)


@pytest.fixture(scope="module")
def grocery_dir(tmp_path_factory):
    """A small grocery-push run (3 days x 4000 rows, several row groups) written as hive partitions."""
    out = tmp_path_factory.mktemp("grocery")
    written = loggen.write_logs(loggen.GROCERY_PUSH, out, 12_000, days=3, seed=7, chunk_rows=1500)
    return out, written


def test_zipf_probs_match_scipy_truncated_zipf():
    # Reference: scipy.stats.zipfian, the truncated Zipf pmf k^-s / H(n, s) for k = 1..n.
    for vocab, s in [(3, 1.0), (1000, 1.1), (5000, 0.7), (200_000, 1.3)]:
        k = np.arange(1, vocab + 1)
        np.testing.assert_allclose(loggen.zipf_probs(vocab, s), stats.zipfian(s, vocab).pmf(k), rtol=1e-10)


def test_sample_ranks_fit_the_pmf():
    # Reference: Pearson chi-square goodness of fit (scipy.stats.chisquare), common practice.
    p = loggen.zipf_probs(40, 1.2)
    rng = np.random.default_rng(3)
    counts = np.bincount(loggen.sample_ranks(rng, np.cumsum(p), 200_000), minlength=40)
    assert stats.chisquare(counts, 200_000 * p).pvalue > 1e-4


def test_rank_frequency_slope_matches_exponent(mini_file):
    # Reference: Zipf's law definition, frequency proportional to rank^-s, so the log-log slope is -s;
    # fitted with numpy.polyfit over the 30 most frequent values (counts >= ~170 each).
    table = mini_file[1]
    for name, s in [("big", 0.9), ("num_id", 1.2)]:
        values = table.column(name).drop_null()
        counts = np.sort(values.value_counts().field("counts").to_numpy())[::-1][:30]
        slope = np.polyfit(np.log(np.arange(1, 31)), np.log(counts), 1)[0]
        assert abs(slope + s) < 0.15, (name, slope)


def test_labels_agree_with_true_probabilities(mini_file):
    # Reference: the label sum is Poisson-binomial with variance sum p(1 - p) (common practice);
    # 4 standard deviations.
    written, table = mini_file
    y = table.column("y").to_numpy().astype(float)
    p = table.column("p_true").to_numpy()
    assert abs(y.sum() - p.sum()) < 4 * np.sqrt(np.sum(p * (1 - p)))
    assert written.positives == [int(np.count_nonzero(y[i * 20_000:(i + 1) * 20_000])) for i in range(3)]


def test_first_day_rate_matches_configured_base_rate(mini_file):
    # Reference: exact binomial test (scipy.stats.binomtest) of the first day's labels against the
    # configured base rate (the bias is calibrated on day 1; MINI has no drift and no weekday field).
    table = mini_file[1]
    day0 = table.filter(pc.equal(table.column("event_day"), pa.scalar(dt.date(2024, 1, 1))))
    k = int(np.count_nonzero(day0.column("y").to_numpy()))
    assert stats.binomtest(k, day0.num_rows, MINI.base_rate).pvalue > 1e-4
    assert abs(day0.column("p_true").to_numpy().mean() - MINI.base_rate) < 0.002


def test_null_rates_and_multi_lengths(mini_file):
    # Reference: exact binomial test of each null count against the configured rate (scipy.stats.binomtest).
    table = mini_file[1]
    n = table.num_rows
    for name, rate in [("num_id", 0.1), ("tags", 0.05), ("amount", 0.2), ("big", 0.0)]:
        nulls = table.column(name).null_count
        if rate == 0.0:
            assert nulls == 0
        else:
            assert stats.binomtest(nulls, n, rate).pvalue > 1e-4, name
    tags = table.column("tags").combine_chunks()
    lengths = pc.list_value_length(tags).drop_null().to_numpy()
    # lengths 0..3 with probabilities (0.2, 0.3, 0.3, 0.2): chi-square fit, common practice.
    counts = np.bincount(lengths, minlength=4)
    assert counts.size == 4
    assert stats.chisquare(counts, counts.sum() * np.array([0.2, 0.3, 0.3, 0.2])).pvalue > 1e-4
    elements = set(pc.list_flatten(tags).to_pylist())
    assert elements <= {f"t{k:02d}" for k in range(1, 31)}


def test_true_model_recovered_by_statsmodels_logit(tmp_path):
    # Reference: statsmodels Logit maximum likelihood on one-hot columns + log1p(amount); each fitted
    # coefficient lies within 4 standard errors of the generator's true effect. p_true must equal
    # scipy.special.expit of the true linear predictor.
    config = LogConfig(
        name="recover", label="y",
        fields=(Categorical("a", labels=("a0", "a1", "a2"), zipf=0.5, effect_sd=0.6),
                Categorical("b", labels=("b0", "b1", "b2", "b3"), zipf=0.3, effect_sd=0.6),
                Numeric("amount", loc=1.5, scale=0.8, coef=0.5, spec={"transform": "log1p"})),
        interactions=(), base_rate=0.2, start_day="2024-01-01", bits=10)
    out = tmp_path / "r.parquet"
    loggen.write_logs(config, out, 40_000, seed=5, chunk_rows=10_000, with_truth=True)
    t = pq.read_table(out)
    truth = loggen.build_truth(config, 5, 1)
    a = pc.index_in(t.column("a"), truth.fields["a"].values).to_numpy()
    b = pc.index_in(t.column("b"), truth.fields["b"].values).to_numpy()
    x = np.log1p(t.column("amount").to_numpy())
    X = np.column_stack([np.ones(t.num_rows), a == 1, a == 2, b == 1, b == 2, b == 3, x]).astype(float)
    ea, eb = truth.fields["a"].effects, truth.fields["b"].effects
    beta = np.array([truth.bias + ea[0] + eb[0], ea[1] - ea[0], ea[2] - ea[0],
                     eb[1] - eb[0], eb[2] - eb[0], eb[3] - eb[0], 0.5])
    np.testing.assert_allclose(t.column("p_true").to_numpy(), expit(X @ beta), rtol=1e-12)
    fit = sm.Logit(t.column("y").to_numpy().astype(float), X).fit(disp=0)
    assert np.all(np.abs(fit.params - beta) < 4 * fit.bse), (fit.params, beta)


def test_same_seed_same_bytes_other_seed_differs(grocery_dir, tmp_path):
    # Reference: determinism requirement of the generator (common practice: seeded streams).
    out, _ = grocery_dir
    again = tmp_path / "again"
    other = tmp_path / "other"
    loggen.write_logs(loggen.GROCERY_PUSH, again, 12_000, days=3, seed=7, chunk_rows=1500)
    loggen.write_logs(loggen.GROCERY_PUSH, other, 12_000, days=3, seed=8, chunk_rows=1500)
    files = sorted(p.relative_to(out) for p in out.rglob("*") if p.is_file())
    assert len(files) == 4
    for rel in files:
        assert (out / rel).read_bytes() == (again / rel).read_bytes(), rel
    assert (out / files[0]).read_bytes() != (other / files[0]).read_bytes()


def test_grocery_layout_and_schema(grocery_dir):
    # Reference: the types documented in loggen.arrow_schema and demo_data/README.md; hive layout
    # key=value folders (common practice); weekday from datetime.date.strftime("%a") in the C locale.
    out, written = grocery_dir
    expected = {name: pa.string() for name in (
        "campaign", "promo_type", "trigger", "template", "store_zone", "device_os", "app_version", "weekday",
        "customer_segment", "postcode_prefix", "recipient_cohort", "favourite_aisle")}
    expected.update(hour=pa.int32(), basket_value_avg=pa.float64(), days_since_last_order=pa.int32(),
                    ordered=pa.bool_())
    days = ["2024-05-06", "2024-05-07", "2024-05-08"]
    assert written.days == days and written.rows == [4000, 4000, 4000]
    for day in days:
        path = out / "logs" / f"event_day={day}" / "part-0.parquet"
        schema = pq.read_schema(path)
        assert "event_day" not in schema.names and "p_true" not in schema.names
        assert set(schema.names) == set(expected) | {"recent_tags"}
        for name, typ in expected.items():
            assert schema.field(name).type == typ, name
        assert pa.types.is_list(schema.field("recent_tags").type)
        assert schema.field("recent_tags").type.value_type == pa.string()
        meta = pq.ParquetFile(path).metadata
        assert [meta.row_group(i).num_rows for i in range(meta.num_row_groups)] == [1500, 1500, 1000]
        campaign = meta.row_group(0).column(schema.names.index("campaign"))
        assert "RLE_DICTIONARY" in campaign.encodings
        weekday = set(pq.read_table(path, columns=["weekday"]).column("weekday").to_pylist())
        assert weekday == {dt.date.fromisoformat(day).strftime("%a")}
    hours = pq.read_table(out / "logs").column("hour").to_numpy()
    assert hours.min() >= 0 and hours.max() <= 23


def test_grocery_spec_follows_contract(grocery_dir):
    # Reference: schemas/feature-spec.schema.json via the jsonschema library, and the README's spec section.
    out, _ = grocery_dir
    spec = json.loads((out / "spec.json").read_text())
    schema = json.loads((Path(__file__).parents[1] / "schemas" / "feature-spec.schema.json").read_text())
    jsonschema.validate(spec, schema)
    parse_spec(spec)
    assert spec["label"] == {"column": "ordered"}
    assert spec["time"] == {"column": "event_day"}
    assert spec["hashing"] == {"bits": 18, "seed": 0}
    assert spec["crosses"] == [["campaign", "hour"]]
    kinds = {f["column"]: f for f in spec["features"]}
    assert kinds["recent_tags"]["kind"] == "multi"
    assert kinds["basket_value_avg"] == {"column": "basket_value_avg", "kind": "numeric", "transform": "log1p"}
    edges = kinds["days_since_last_order"]["edges"]
    assert edges == sorted(set(edges))
    names = set(pq.read_schema(next((out / "logs").rglob("*.parquet"))).names)
    assert set(kinds) <= names and "ordered" in names


def test_single_file_holds_event_day(mini_file):
    # Reference: Arrow date32 type; one event_day per 20000-row day in order (loggen.write_logs docstring).
    written, table = mini_file
    assert table.schema.field("event_day").type == pa.date32()
    assert written.spec_path.name == "mini.spec.json"
    days = table.column("event_day").to_pylist()
    assert days[0] == dt.date(2024, 1, 1) and days[-1] == dt.date(2024, 1, 3)
    assert [days.count(dt.date(2024, 1, d)) for d in (1, 2, 3)] == [20_000, 20_000, 20_000]


@pytest.mark.parametrize("bad, needle", [
    (dict(base_rate=1.5), "base_rate"),
    (dict(interactions=(Interaction(("small", "tags"), 0.1),)), "interaction"),
    (dict(fields=MINI.fields + (Categorical("big", vocab=3),)), "unique"),
    (dict(fields=(Numeric("v", 0.0, 1.0, 0.1, spec={"edges": [3, 1]}),)), "edges"),
])
def test_bad_config_raises_user_error(bad, needle):
    # Reference: project rule, user mistakes raise UserError naming the option (common practice).
    with pytest.raises(UserError, match=needle):
        loggen.validate_config(dataclasses.replace(MINI, **bad))


def test_cli_errors_are_one_line(grocery_dir, tmp_path, capsys):
    # Reference: project rule, exit code 2 and a one-line message naming the option (common practice).
    out, _ = grocery_dir
    code = loggen.main(["--config", "grocery-push", "--rows", "100", "--days", "2", "--out", str(out)])
    err = capsys.readouterr().err.strip()
    assert_one_line(code, err, "--out")
    assert "--overwrite" in err
    assert loggen.main(["--config", "bench20", "--rows", "3", "--days", "5",
                        "--out", str(tmp_path / "b.parquet")]) == 2
    assert "--rows" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:
        loggen.main(["--config", "bench20", "--rows", "0", "--out", str(tmp_path / "c.parquet")])
    assert exc.value.code == 2


def test_bench20_config_shape():
    # Reference: the benchmark brief: 20 categorical fields, vocabularies from 3 to 2e5, one interaction.
    vocabs = [loggen.field_vocab(f) for f in loggen.BENCH20.fields]
    assert len(vocabs) == 20 and min(vocabs) == 3 and max(vocabs) == 200_000
    assert all(isinstance(f, Categorical) for f in loggen.BENCH20.fields)
    assert len(loggen.BENCH20.interactions) == 1 and loggen.make_spec(loggen.BENCH20)["hashing"]["bits"] == 20


def test_make_demo_logs_writes_demo_without_truth(tmp_path, capsys):
    # Reference: demo brief: hive partitions, spec.json and README.md; no true-probability column.
    out = tmp_path / "demo"
    assert make_demo_logs.main(["--out", str(out), "--rows-per-day", "500", "--days", "2", "--seed", "3"]) == 0
    assert sorted(p.name for p in out.iterdir()) == ["README.md", "logs", "spec.json"]
    parts = sorted((out / "logs").glob("event_day=*/part-0.parquet"))
    assert len(parts) == 2
    assert "p_true" not in pq.read_schema(parts[0]).names
    readme = (out / "README.md").read_text()
    assert f"--out {out} --rows-per-day 500 --days 2 --seed 3" in readme
    assert make_demo_logs.main(["--out", str(out), "--days", "2"]) == 2
    assert "--overwrite" in capsys.readouterr().err
