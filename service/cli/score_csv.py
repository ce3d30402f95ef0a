"""``evenhand score``: score a CSV file of cases into a CSV file of decisions, in process.

The same path as ``POST /v1/recommendations/stream`` (``service.store.bulk_scoring``): rows are
read, decided and recorded in chunks against the configured database, each chunk committed
before its decisions are written out, so memory stays flat whatever the file's size.

Input columns: ``request_id``, ``case_id``, ``score``, ``policy`` (or ``--policy`` for every
row); every other column is an attribute, an empty cell an attribute not given. Output: one
row per decision with the fields of ``RecommendationResponse``, in input order. A bad row
stops the run with its file, line and column (exit 2): the rows before it are recorded and
written out, and running again after fixing it replays them (same request_ids, same answers,
nothing written twice).
"""

from __future__ import annotations

import argparse
import csv
import json
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO

from service.cli.common import CliError

if TYPE_CHECKING:
    from service.store.bulk_scoring import Read

REQUIRED = ("request_id", "case_id", "score")
OUTPUT_FIELDS = (
    "recommendation_id",
    "request_id",
    "case_id",
    "policy",
    "version",
    "group",
    "rule",
    "probability",
    "draw",
    "action",
    "action_label",
    "issued_at",
)


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "score",
        help="score a CSV file of cases into a CSV file of decisions (streamed, recorded)",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--in", dest="source", type=Path, required=True, help="cases (CSV)")
    p.add_argument("--out", type=Path, required=True, help="decisions (CSV), overwritten")
    p.add_argument("--policy", help="the policy of every row (when there is no policy column)")
    p.add_argument("--chunk", type=int, default=5_000, help="rows per commit (default 5000)")
    p.set_defaults(handler=run)


def _requests(source: Path, handle: TextIO, policy: str | None, progress: Any) -> Iterator[Read]:
    """Each row as (line number, request), or the refusal of the first bad row (then stops)."""
    from pydantic import ValidationError

    from service.api.errors import validation_details
    from service.api.recommendation_schemas import RecommendationRequest
    from service.store.bulk_scoring import LineRefused

    reader = csv.reader(handle)
    header = next(reader, None)
    if header is None:
        raise CliError(f"{source}: the file is empty (a header row is expected)")
    missing = [c for c in REQUIRED if c not in header]
    if "policy" not in header and policy is None:
        missing.append("policy (or --policy)")
    if missing:
        raise CliError(f"{source}: line 1: missing column(s): {', '.join(missing)}")
    at = {name: header.index(name) for name in (*REQUIRED, "policy") if name in header}
    named = set(at)
    attributes = [(i, name) for i, name in enumerate(header) if name not in named]
    width = len(header)
    for row in reader:
        line = reader.line_num
        progress.update(1)
        if not row:
            continue
        if len(row) != width:
            yield LineRefused(
                line, "bad_row", f"has {len(row)} cells; the header has {width}", None
            )
            return
        try:
            score: float | str = float(row[at["score"]])
        except ValueError:
            score = row[at["score"]]  # refused below with the schema's message
        body = {
            "request_id": row[at["request_id"]],
            "case_id": row[at["case_id"]],
            "policy": row[at["policy"]] if "policy" in at else policy,
            "score": score,
            "attributes": {name: row[i] for i, name in attributes if row[i] != ""},
        }
        try:
            yield line, RecommendationRequest.model_validate(body)
        except ValidationError as exc:
            first = validation_details(exc.errors())[0]
            field = first["field"]
            column = field.split(".")[1] if field and field.startswith("attributes.") else field
            yield LineRefused(line, "validation_error", first["message"], column)
            return


class _RowBar:
    """A tqdm bar counting rows on a terminal; nothing otherwise (service.cli.progress)."""

    def __init__(self) -> None:
        from service.cli.progress import bars_enabled

        self._bar: Any = None
        if bars_enabled():
            from tqdm import tqdm

            self._bar = tqdm(desc="scoring", unit=" rows", file=sys.stderr, unit_scale=True)

    def update(self, n: int) -> None:
        if self._bar is not None:
            self._bar.update(n)

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()


def run(args: argparse.Namespace) -> int:
    if args.chunk < 1:
        raise CliError("--chunk must be at least 1")
    if not args.source.is_file():
        raise CliError(f"{args.source}: no such file")
    from service.settings import Settings
    from service.store.bulk_scoring import LineRefused, score_all
    from service.store.db import create_db_engine
    from service.store.scoring import DocumentCache, ScoringContext

    settings = Settings()
    ctx = ScoringContext(settings.draw_key(), DocumentCache(), settings.max_batch_items)
    engine = create_db_engine(settings)
    bar = _RowBar()
    written = created = 0
    try:
        with (
            args.source.open(newline="", encoding="utf-8") as handle,
            args.out.open("w", newline="", encoding="utf-8") as out,
        ):
            writer = csv.writer(out, lineterminator="\n")
            writer.writerow(OUTPUT_FIELDS)
            lines = _requests(args.source, handle, args.policy, bar)
            for answer in score_all(engine, lines, ctx, args.chunk):
                for text in answer.responses:
                    decision = json.loads(text)
                    decision["action"] = "true" if decision["action"] else "false"
                    writer.writerow([decision[f] for f in OUTPUT_FIELDS])
                written += len(answer.responses)
                created += answer.created
                error = answer.error
                if isinstance(error, LineRefused):
                    column = f", column {error.column}" if error.column else ""
                    raise CliError(
                        f"{args.source}: line {error.line}{column}: {error.reason} "
                        f"({error.code}); the {written} "
                        f"row(s) before it are recorded and in {args.out}"
                    )
                if error is not None:
                    raise error
    except UnicodeDecodeError as exc:
        raise CliError(f"{args.source}: not UTF-8 text ({exc.reason})") from None
    finally:
        bar.close()
        engine.dispose()
    print(
        f"scored {written} row(s) into {args.out}: {created} new, {written - created} replayed",
        file=sys.stderr,
    )
    return 0
