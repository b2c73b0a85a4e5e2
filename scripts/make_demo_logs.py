"""Write the shipped demo: invented grocery-delivery push-notification logs, their spec and a README.

    python scripts/make_demo_logs.py [--out demo_data] [--rows-per-day N] [--days 8] [--seed 7] [--overwrite]

Output: ``OUT/logs/event_day=YYYY-MM-DD/part-0.parquet`` (hive partitions, no event_day column inside the
files), ``OUT/spec.json`` and ``OUT/README.md``. The rows come from the "grocery-push" config of
``loggen.py``; the true probability column is not written.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import loggen
from loggen import GROCERY_PUSH, Categorical, Multi, UserError

from trainer.atomic import write_atomic

DESCRIPTIONS = {
    "campaign": "promotional campaign the notification belongs to",
    "promo_type": "kind of offer in the notification",
    "trigger": "what caused the send",
    "template": "message template (wording and layout)",
    "store_zone": "delivery zone of the recipient's nearest store",
    "device_os": "platform the notification was delivered to",
    "app_version": "app version on the device (null: unknown)",
    "hour": "local hour of sending, 0..23",
    "weekday": "weekday of the event day (same for every row of a partition)",
    "customer_segment": "marketing segment of the recipient",
    "postcode_prefix": "first part of the recipient's postcode",
    "recipient_cohort": "hashed recipient cohort id",
    "favourite_aisle": "aisle the recipient buys from most (null: not enough history)",
    "recent_tags": "product tags of the recipient's recent browsing, 0-5 elements, repeats possible (null: none recorded)",
    "basket_value_avg": "average basket value of past orders (null: no past order)",
    "days_since_last_order": "whole days since the last order (null: no past order)",
    "ordered": "label: the recipient placed an order within 24 hours of the notification",
}


def _values_text(f) -> str:
    if isinstance(f, Categorical):
        if f.by_day:
            return str(loggen.field_vocab(f))
        how = "daily curve" if f.probs is not None else f"Zipf s={f.zipf}"
        return f"{loggen.field_vocab(f)} ({how})"
    if isinstance(f, Multi):
        return f"{f.vocab} tags (Zipf s={f.zipf})"
    return "numeric (log-normal)"


def readme_text(written: loggen.WrittenLogs, args: argparse.Namespace) -> str:
    """The README of the demo folder: scenario, columns, generation command, per-day figures.

    Takes what ``write_logs`` returned and the parsed options; returns Markdown text.
    """
    schema = loggen.arrow_schema(GROCERY_PUSH)
    spec = loggen.make_spec(GROCERY_PUSH)
    fields = {f.name: f for f in GROCERY_PUSH.fields}
    lines = [
        "# Demo logs: grocery-delivery push notifications (invented)",
        "",
        "Everything here is made up by a random generator; no real company, person or data is behind it.",
        "",
        "A regional grocery-delivery app sends promotional push notifications. One row is one notification",
        "sent; the label `ordered` says whether the recipient placed an order within 24 hours. Campaigns,",
        "zones, postcodes and recipients follow Zipf-like popularity; the chance of an order comes from a",
        "logistic model with a random effect per value of every field, a campaign x hour interaction,",
        "effects of the two numeric fields, and campaign / promo-type effects that drift slowly from day",
        "to day. Some fields have nulls.",
        "",
        "## Layout",
        "",
        "- `logs/event_day=YYYY-MM-DD/part-0.parquet`: one hive partition per day; the date lives in the",
        "  folder name only (no `event_day` column inside the files). Row groups of "
        f"{args.chunk_rows} rows;",
        "  strings are dictionary-encoded.",
        f"- `spec.json`: feature spec (hashing bits {spec['hashing']['bits']}, seed {spec['hashing']['seed']}; "
        "one multi feature, one log1p",
        "  numeric, one bucketed numeric, cross campaign x hour).",
        f"- Suggested split: the first {len(written.days) - 1} days to train, the last day "
        f"({written.days[-1]}) held out.",
        "",
        "## Columns",
        "",
        "| column | Arrow type | values | nulls | meaning |",
        "|---|---|---|---|---|",
    ]
    for col in schema:
        if col.name in fields:
            f = fields[col.name]
            lines.append(f"| `{col.name}` | {col.type} | {_values_text(f)} | {f.null_rate:.0%} | "
                         f"{DESCRIPTIONS[col.name]} |")
        else:
            lines.append(f"| `{col.name}` | {col.type} | true/false | 0% | {DESCRIPTIONS[col.name]} |")
    lines += [
        "",
        "## Per day",
        "",
        "| event_day | rows | orders | order rate | mean true probability |",
        "|---|---|---|---|---|",
    ]
    for day, n, pos, mp in zip(written.days, written.rows, written.positives, written.mean_p):
        lines.append(f"| {day} | {n} | {pos} | {pos / n:.4f} | {mp:.4f} |")
    lines += [
        "",
        f"Total: {sum(written.rows)} rows, {written.bytes / 1e6:.1f} MB of Parquet.",
        "",
        "## How it was generated",
        "",
        "From the repository root:",
        "",
        "```",
        f"python scripts/make_demo_logs.py --out {args.out} --rows-per-day {args.rows_per_day} "
        f"--days {args.days} --seed {args.seed}",
        "```",
        "",
        "(add `--overwrite` to regenerate in place). Same options and seed give identical files. The",
        "generator is `scripts/loggen.py`, config \"grocery-push\" (base rate "
        f"{GROCERY_PUSH.base_rate} on the first day).",
        f"The same rows with the true probability column `{loggen.TRUTH_COLUMN}` added, for checks:",
        "",
        "```",
        f"python scripts/loggen.py --config grocery-push --rows {sum(written.rows)} --days {args.days} "
        f"--seed {args.seed} --with-truth --out /tmp/grocery-truth",
        "```",
        "",
    ]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    """Command line: write the demo logs, spec and README into ``--out``.

    Returns the exit code: 0 on success, 2 after printing a one-line UserError message.
    """
    ap = argparse.ArgumentParser(prog="make_demo_logs.py", description="Write the invented grocery-push "
                                 "demo logs (hive-partitioned Parquet), their spec.json and README.md.")
    ap.add_argument("--out", default="demo_data", help="output folder (default demo_data)")
    ap.add_argument("--rows-per-day", type=loggen.int_option(1), default=25_000,
                    help="rows per event day (default 25000)")
    ap.add_argument("--days", type=loggen.int_option(1), default=8, help="number of event days (default 8)")
    ap.add_argument("--seed", type=loggen.int_option(0), default=7, help="generator seed (default 7)")
    ap.add_argument("--overwrite", action="store_true", help="replace the partitions of an existing output")
    args = ap.parse_args(argv)
    args.chunk_rows = 16384
    try:
        written = loggen.write_logs(GROCERY_PUSH, args.out, args.rows_per_day * args.days, days=args.days,
                                    seed=args.seed, chunk_rows=args.chunk_rows, overwrite=args.overwrite)
    except UserError as exc:
        print(f"make_demo_logs.py: error: {exc}", file=sys.stderr)
        return 2
    write_atomic(Path(args.out) / "README.md", [readme_text(written, args).encode("utf-8")])
    rate = sum(written.positives) / sum(written.rows)
    print(f"wrote {sum(written.rows)} rows over {args.days} days to {written.data_path} "
          f"({written.bytes / 1e6:.1f} MB, order rate {rate:.4f}), {written.spec_path}, README.md")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
