"""The bad-input matrix: every case exits 2 with one line on stderr that names the culprit (file,
column or option), no traceback, and no new or changed file in the case's folder, which holds its
inputs and its --out (a byte-for-byte snapshot of the tree before and after).

Reference: the README's promise ("Every command prints a one-line error and exits 2 on bad input
... and writes nothing partial") and common practice for command-line tools (errors on stderr with a
non-zero status, usage errors exit 2). Cases run the CLI in-process (``trainer.cli.main``).
"""

import copy
import json
import shutil
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from trainer.cli import main

from conftest import SMALL_SPEC, assert_one_line, make_table

ROWS = 240


def write_log(folder: Path, tables) -> Path:
    """A hive-partitioned folder with one file per day (2026-03-01, 02, ...)."""
    for d, t in enumerate(tables, start=1):
        part = folder / f"day=2026-03-0{d}"
        part.mkdir(parents=True)
        pq.write_table(t, part / "part-0.parquet")
    return folder


def good_tables(n_days=2, seed=7):
    rng = np.random.default_rng(seed)
    return [make_table(rng, ROWS) for _ in range(n_days)]


def with_column(table: pa.Table, name: str, values) -> pa.Table:
    arr = values if isinstance(values, (pa.Array, pa.ChunkedArray)) else pa.array(values)
    return table.set_column(table.schema.get_field_index(name), name, arr)


def snapshot(root: Path) -> dict:
    return {str(p.relative_to(root)): (p.read_bytes() if p.is_file() else "dir") for p in sorted(root.rglob("*"))}


class Case:
    """Inputs under ``root`` (``root/in``), output at ``root/out``; ``argv`` built from them."""

    def __init__(self, root: Path, trained: Path):
        self.root, self.trained = root, trained
        self.inp = root / "in"
        self.inp.mkdir()
        self.out = root / "out"
        self.spec = self.write_spec(SMALL_SPEC)
        self.data = None

    def write_spec(self, obj, name="spec.json") -> Path:
        path = self.inp / name
        path.write_text(obj if isinstance(obj, str) else json.dumps(obj))
        return path

    def spec_with(self, **changes) -> Path:
        s = copy.deepcopy(SMALL_SPEC)
        s.update(changes)
        return self.write_spec(s, "changed.json")

    def log(self, tables=None) -> Path:
        return write_log(self.inp / "logs", tables if tables is not None else good_tables())

    def train(self, *extra, spec=None, data=None):
        data = data if data is not None else (self.data or self.log())
        return ["train", "--spec", str(spec or self.spec), "--data", str(data), "--out", str(self.out),
                "--quiet", "--batch-rows", "64", "--epochs", "1", *extra]

    def copy_model(self, form: str) -> Path:
        """A copy of the shared trained model folder ("model") or its export ("export")."""
        dst = self.inp / form
        shutil.copytree(self.trained / form, dst)
        return dst


def edit_json(path: Path, edit) -> None:
    doc = json.loads(path.read_text())
    edit(doc)
    path.write_text(json.dumps(doc, indent=1))


def flip_byte(path: Path) -> None:
    raw = bytearray(path.read_bytes())
    raw[len(raw) // 2] ^= 0x01
    path.write_bytes(bytes(raw))


def _spec_case(mutate):
    def build(c: Case):
        s = copy.deepcopy(SMALL_SPEC)
        mutate(s)
        return c.train(spec=c.write_spec(s, "bad.json"))
    return build


def _feature(i, **kv):
    def mutate(s):
        s["features"][i].update(kv)
    return mutate


def _data_case(change, every_day=False):
    """Day 2 of the log (or every day) changed by ``change(table) -> table``."""
    def build(c: Case):
        t1, t2 = good_tables()
        return c.train(data=c.log([change(t1) if every_day else t1, change(t2)]))
    return build


def _labels(values):
    return lambda t: with_column(t, "clicked", pa.array(values))


def _amount_at(value):
    def change(t):
        a = t.column("amount").to_pylist()
        a[5] = value
        return with_column(t, "amount", pa.array(a, pa.float64()))
    return change


def _cut_in_half(c: Case):
    data = c.log()
    f = data / "day=2026-03-02" / "part-0.parquet"
    f.write_bytes(f.read_bytes()[: f.stat().st_size // 2])
    return c.train(data=data)


def _not_parquet(c: Case):
    data = c.log()
    (data / "day=2026-03-02" / "notes.parquet").write_text("this is a text file, not Parquet\n")
    return c.train(data=data)


def _empty_folder(c: Case):
    (c.inp / "empty").mkdir()
    return c.train(data=c.inp / "empty")


def _zero_row_file(c: Case):
    t = good_tables(1)[0]
    return c.train(data=c.log([t.slice(0, 0)]))


def _out_is_file(c: Case):
    c.out.write_text("a file where the model folder should go\n")
    return c.train()


def _out_holds_other_files(c: Case):
    c.out.mkdir()
    (c.out / "notes.txt").write_text("mine\n")
    return c.train()


def _resume_nothing(c: Case):
    return c.train("--resume")


def _model_case(command, form, damage):
    def build(c: Case):
        folder = c.copy_model(form)
        damage(folder)
        data = c.log()
        if command == "score":
            return ["score", "--model", str(folder), "--data", str(data), "--out", str(c.out / "s.parquet")]
        if command == "evaluate":
            return ["evaluate", "--model", str(folder), "--data", str(data), "--json", str(c.out / "e.json")]
        if command == "export":
            return ["export", "--model", str(folder), "--out", str(c.out)]
        return ["inspect", "--model", str(folder)]
    return build


def _intercept_plus_one(folder):
    edit_json(folder / "model.json", lambda d: d.update(intercept=d["intercept"] + 1))


def _seed_changed(folder):
    def edit(d):
        d["spec"]["hashing"]["seed"] += 1
        if "hashing" in d:
            d["hashing"]["seed"] += 1
    edit_json(folder / "model.json", edit)


def _link_changed(folder):
    edit_json(folder / "model.json", lambda d: d.update(link="identity-margin", loss="squared-hinge"))


def _weights_byte(folder):
    flip_byte(folder / "weights.parquet")


def _npz_byte(folder):
    flip_byte(folder / "model.npz")


def _loss_changed(folder):
    edit_json(folder / "model.json", lambda d: d.update(loss="squared-hinge"))


def _huge_identity(c: Case):
    spec = copy.deepcopy(SMALL_SPEC)
    spec["features"][3] = {"column": "amount", "kind": "numeric"}
    t1, t2 = good_tables()
    big = lambda t: with_column(t, "amount", pa.array(np.full(ROWS, 1e300)))  # noqa: E731
    # online passes only: the log is tiny, and full-batch L-BFGS-B fits a tiny finite weight instead
    return c.train("--full-batch-memory", "0", spec=c.write_spec(spec, "identity.json"), data=c.log([big(t1), big(t2)]))


def _sweep(*extra, spec_changes=None):
    """A run of several L2 strengths (day 2 held out unless ``extra`` says otherwise)."""
    def build(c: Case):
        spec = c.spec_with(**spec_changes) if spec_changes else None
        holdout = () if "--holdout-start" in extra or "no holdout" in extra else (
            "--holdout-start", "2026-03-02", "--holdout-end", "2026-03-02")
        return c.train(*(e for e in extra if e != "no holdout"), *holdout, spec=spec)
    return build


ONE_CLASS_ZERO = _data_case(_labels(np.zeros(ROWS, dtype=np.int64)), every_day=True)

# name -> (build(case) -> argv, text the one line must hold)
CASES = {
    # specs
    "spec not JSON": (lambda c: c.train(spec=c.write_spec("{\"label\": ", "bad.json")), "bad.json: spec is not valid JSON"),
    "unknown kind": (_spec_case(_feature(0, kind="text")), "features[0].kind"),
    "bits 0": (_spec_case(lambda s: s.update(hashing={"bits": 0})), "hashing.bits"),
    "bits 31": (_spec_case(lambda s: s.update(hashing={"bits": 31})), "hashing.bits"),
    "bits as text": (_spec_case(lambda s: s.update(hashing={"bits": "20"})), "hashing.bits"),
    "duplicate column": (_spec_case(lambda s: s["features"].append({"column": "shop", "kind": "categorical"})),
                         "repeats column 'shop'"),
    "cross over unknown feature": (_spec_case(lambda s: s.update(crosses=[["shop", "colour"]])), "'colour'"),
    "unsorted edges": (_spec_case(_feature(4, edges=[7, 1, 30])), "features[4].edges"),
    "repeated edges": (_spec_case(_feature(4, edges=[1, 7, 7])), "features[4].edges"),
    "no label key": (_spec_case(lambda s: s.pop("label")), "key 'label' is required"),
    "label column absent from data": (_spec_case(lambda s: s.update(label={"column": "opened"})), "'opened'"),
    "spec file missing": (lambda c: c.train(spec=c.inp / "nowhere.json"), "nowhere.json: spec file not found"),
    # data
    "empty folder": (_empty_folder, "folder holds no Parquet files"),
    "zero-row file": (_zero_row_file, "no rows left after the filters"),
    "all labels null": (_data_case(_labels(pa.nulls(ROWS, pa.int64()))), "'clicked' has 240 null"),
    "label 2": (_data_case(_labels(np.full(ROWS, 2))), "'clicked' has 240 null or unaccepted"),
    "label yes without mapping": (_data_case(_labels(["yes"] * ROWS), every_day=True), "'label.positive'"),
    "NaN numeric": (_data_case(_amount_at(np.nan)), "'amount' has 1 NaN or infinite"),
    "inf numeric": (_data_case(_amount_at(np.inf)), "'amount' has 1 NaN or infinite"),
    "floats in a categorical column": (_data_case(lambda t: with_column(t, "shop", np.arange(ROWS) * 0.5)),
                                       "column 'shop' is double"),
    "list column declared categorical": (_spec_case(_feature(2, kind="categorical")),
                                         "'tags' is a list column"),
    "Parquet file cut in half": (_cut_in_half, "day=2026-03-02/part-0.parquet: not a readable Parquet file"),
    "text file with a Parquet suffix": (_not_parquet, "notes.parquet: not a readable Parquet file"),
    "row weights not positive": (_data_case(lambda t: with_column(t, "w", np.zeros(ROWS))), "'w' has 240"),
    "every label 0": (ONE_CLASS_ZERO, "480 negative and 0 positive labels (column 'clicked')"),
    "every label 1": (_data_case(_labels(np.ones(ROWS, dtype=np.int64)), every_day=True),
                      "0 negative and 480 positive labels (column 'clicked')"),
    "date filter selects nothing": (lambda c: c.train("--start", "2031-01-01"), "selects no files"),
    "identity numerics of 1e300 diverge": (_huge_identity, "column 'amount' reaches 1e+300"),
    # options
    "--epochs 0": (lambda c: c.train("--epochs", "0"), "--epochs"),
    "--epochs -1": (lambda c: c.train("--epochs", "-1"), "--epochs"),
    "--l2-strength -1": (lambda c: c.train("--l2-strength", "-1"), "--l2-strength"),
    "--l2-strength nan": (lambda c: c.train("--l2-strength", "nan"), "--l2-strength"),
    "--l2-strength inf": (lambda c: c.train("--l2-strength", "inf"), "--l2-strength"),
    "--history 0": (lambda c: c.train("--history", "0"), "--history"),
    "--batch-rows 0": (lambda c: c.train("--batch-rows", "0"), "--batch-rows"),
    "--checkpoint-every 0": (lambda c: c.train("--checkpoint-every", "0"), "--checkpoint-every"),
    "--negative-keep-rate 0": (lambda c: c.train("--negative-keep-rate", "0"), "--negative-keep-rate"),
    "--negative-keep-rate 1.5": (lambda c: c.train("--negative-keep-rate", "1.5"), "--negative-keep-rate"),
    "--start 2024-13-01": (lambda c: c.train("--start", "2024-13-01"), "--start: expected a date"),
    "--start after --end": (lambda c: c.train("--start", "2026-03-02", "--end", "2026-03-01"), "is after end"),
    "--out an existing file": (_out_is_file, "exists and is not a folder"),
    "--out holds other files": (_out_holds_other_files, "folder is not empty"),
    "--resume without a folder": (_resume_nothing, "no checkpoint to resume from"),
    "--holdout missing": (lambda c: c.train("--holdout", str(c.inp / "gone")), "gone: no such file or folder"),
    # several L2 strengths (trainer.sweep)
    "--l2-strength 9 values": (_sweep("--l2-strength", ",".join(f"{k}e-4" for k in range(1, 10))),
                               "--l2-strength: 9 values given; one run trains at most 8"),
    "--l2-strength not a number in the list": (_sweep("--l2-strength", "1e-4,abc"), "--l2-strength must be a number"),
    "--l2-strength empty item": (_sweep("--l2-strength", "1e-4,,1e-3"), "--l2-strength must be a number"),
    "--l2-strength negative in the list": (_sweep("--l2-strength", "1e-4,-1"), "--l2-strength must be a finite"),
    "--l2-strength given twice": (_sweep("--l2-strength", "1e-4,1e-3,0.0001"), "--l2-strength: 0.0001 is given twice"),
    "--l2-strength several without a holdout": (_sweep("--l2-strength", "1e-4,1e-3", "no holdout"),
                                                "--l2-strength: several values need a holdout"),
    "--l2-strength over the memory budget": (_sweep("--l2-strength", "auto",
                                                    spec_changes={"hashing": {"bits": 30, "seed": 42}}),
                                             "over the budget of"),
    "--l2-strength several with --cluster": (_sweep("--l2-strength", "1e-4,1e-3", "--cluster", "local:1"),
                                             "--l2-strength: --cluster trains one L2 strength"),
    # models and exports
    "export: byte flipped in weights.parquet, score": (_model_case("score", "export", _weights_byte),
                                                       "weights.parquet: checksum does not match"),
    "export: byte flipped in weights.parquet, evaluate": (_model_case("evaluate", "export", _weights_byte),
                                                          "weights.parquet: checksum does not match"),
    "export: intercept edited, score": (_model_case("score", "export", _intercept_plus_one),
                                        "model.json: the fields that decide a score"),
    "export: intercept edited, evaluate": (_model_case("evaluate", "export", _intercept_plus_one),
                                           "model.json: the fields that decide a score"),
    "export: intercept edited, inspect": (_model_case("inspect", "export", _intercept_plus_one),
                                          "model.json: the fields that decide a score"),
    "export: intercept edited, export": (_model_case("export", "export", _intercept_plus_one),
                                         "model.json: the fields that decide a score"),
    "export: hashing seed edited, score": (_model_case("score", "export", _seed_changed), "export/model.json"),
    "export: link edited, score": (_model_case("score", "export", _link_changed), "export/model.json"),
    "model folder: byte flipped in model.npz, score": (_model_case("score", "model", _npz_byte),
                                                       "model.npz: checksum does not match"),
    "model folder: loss edited, evaluate": (_model_case("evaluate", "model", _loss_changed),
                                            "model/model.json: the fields that decide a score"),
    "model folder: hashing seed edited, export": (_model_case("export", "model", _seed_changed),
                                                  "model/model.json: the fields that decide a score"),
}


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    """One small trained model folder and its export, copied by the cases that damage them."""
    root = tmp_path_factory.mktemp("trained")
    spec = root / "spec.json"
    spec.write_text(json.dumps(SMALL_SPEC))
    data = write_log(root / "logs", good_tables())
    assert main(["train", "--spec", str(spec), "--data", str(data), "--out", str(root / "model"), "--quiet",
                 "--batch-rows", "64", "--epochs", "1"]) == 0
    assert main(["export", "--model", str(root / "model"), "--out", str(root / "export")]) == 0
    return root


def test_matrix_is_large_enough():
    assert len(CASES) >= 40


@pytest.mark.parametrize("name", sorted(CASES))
def test_bad_input(name, tmp_path, trained, capsys):
    build, needle = CASES[name]
    case = Case(tmp_path, trained)
    argv = build(case)
    before = snapshot(tmp_path)
    capsys.readouterr()
    code = main(argv)
    captured = capsys.readouterr()
    assert_one_line(code, captured.err.strip(), needle)
    assert snapshot(tmp_path) == before


@pytest.mark.parametrize("name", ["floats in a categorical column", "list column declared categorical",
                                  "zero-row file", "all labels null", "NaN numeric", "every label 0",
                                  "identity numerics of 1e300 diverge"])
@pytest.mark.parametrize("existing", [False, True])
def test_refused_run_leaves_nothing_and_the_next_run_works(name, existing, tmp_path, trained, capsys):
    # Issue-19 cases: a refused run removes what it wrote (the folder too when it made it; an empty
    # folder that was there stays), so the same --out takes the next run without --force.
    case = Case(tmp_path, trained)
    if existing:
        case.out.mkdir()
    assert main(CASES[name][0](case)) == 2
    assert (sorted(case.out.iterdir()) == [] if existing else not case.out.exists())
    capsys.readouterr()
    good = write_log(tmp_path / "fixed", good_tables())
    assert main(case.train(data=good)) == 0
    assert (case.out / "model.json").exists()


def test_one_class_option_trains_finite_weights(tmp_path, trained):
    # --allow-one-class: the refusal is lifted and the weights stay finite (all labels 0: the
    # unregularized intercept moves towards -infinity but a finite number of steps keeps it finite).
    case = Case(tmp_path, trained)
    argv = ONE_CLASS_ZERO(case) + ["--allow-one-class"]
    assert main(argv) == 0
    doc = json.loads((case.out / "model.json").read_text())
    assert "NaN" not in (case.out / "model.json").read_text()
    with np.load(case.out / "model.npz") as z:
        assert np.all(np.isfinite(z["weights"])) and np.isfinite(z["intercept"]) and z["intercept"] < 0
    assert doc["info"]["options"]["allow_one_class"] is True
