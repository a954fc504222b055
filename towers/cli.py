"""The command line: parse arguments, call the library, print. No logic lives here."""

from __future__ import annotations

import argparse
import json
import os
import sys
import warnings
from pathlib import Path

from towers import api
from towers.atomic import write_atomic
from towers.errors import TowersError
from towers.training.distributed import launch_workers


class _OneLineParser(argparse.ArgumentParser):
    """Usage mistakes get the same one-line `error:` form (exit 2) as every other user error."""

    def error(self, message: str):
        self.exit(2, f"error: {self.prog}: {message}; see `{self.prog} --help`\n")


def _parser() -> argparse.ArgumentParser:
    p = _OneLineParser(prog="towers", description="Train two-tower embedding models on a CPU.")
    from towers import __version__

    p.add_argument("--version", action="version", version=f"towers {__version__}")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_OneLineParser)

    t = sub.add_parser("train", help="train towers and baselines from a YAML config, evaluate, export")
    t.add_argument("config", help="YAML config file")
    t.add_argument("--out", required=True, help="run folder to write")
    t.add_argument("--overwrite", action="store_true", help="replace an existing run folder")
    t.add_argument("--resume", action="store_true", help="continue an interrupted run (RUN_DIR.partial) exactly")
    t.add_argument("--init-from", metavar="RUN_DIR", help="start from an earlier run's weights and encoders (new logs)")
    t.add_argument("--workers", type=int, default=1, metavar="N",
                   help="train in N data-parallel processes on this machine (through torchrun; default 1)")

    e = sub.add_parser("evaluate", help="re-score a run on its held-out pairs or on a new interaction file")
    e.add_argument("run_dir")
    e.add_argument("--interactions", help="new held-out interactions (same columns as the config)")
    e.add_argument("--json", action="store_true", help="print metrics as JSON instead of a table")

    m = sub.add_parser("embed", help="embed entities from their feature rows alone")
    m.add_argument("run_dir")
    side = m.add_mutually_exclusive_group(required=True)
    side.add_argument("--items", help="item feature table (CSV or parquet)")
    side.add_argument("--users", help="user feature table (CSV or parquet)")
    m.add_argument("--out", required=True, help="parquet file to write")
    m.add_argument("--history-column", metavar="NAME",
                   help="with --users, for runs trained with model.history_length > 0: the column holding each user's "
                        "item ids (a list, or text joined by --history-separator), the last the latest")
    m.add_argument("--history-separator", default="|", metavar="SEP",
                   help="what joins the item ids of a text --history-column (default |)")

    r = sub.add_parser("recommend", help="top items for users (their known training and validation positives excluded)")
    r.add_argument("run_dir")
    who = r.add_mutually_exclusive_group(required=True)
    who.add_argument("--users", nargs="+", help="user ids")
    who.add_argument("--history", nargs="+", metavar="ITEM",
                     help="a new user known only by these item ids (the last the latest), for runs trained with "
                          "model.history_length > 0; the items are excluded")
    who.add_argument("--user-rows", metavar="FILE",
                     help="users not in the run, given by feature rows (CSV or parquet); with --history-column for "
                          "runs trained with model.history_length > 0")
    r.add_argument("--history-column", metavar="NAME",
                   help="with --user-rows: the column holding each user's item ids (as embed --history-column)")
    r.add_argument("--history-separator", default="|", metavar="SEP",
                   help="what joins the item ids of a text --history-column (default |)")
    r.add_argument("--top", type=int, default=10, help="how many items per user (default 10)")
    r.add_argument("--context", nargs="+", metavar="COLUMN=VALUE",
                   help="the event's context for runs trained with interactions.context, e.g. channel=app hour=20")
    r.add_argument("--out", help="write .csv, .parquet or .pq instead of printing")
    _list_options(r)

    s = sub.add_parser("similar", help="most similar items for items")
    s.add_argument("run_dir")
    which = s.add_mutually_exclusive_group(required=True)
    which.add_argument("--items", nargs="+", help="item ids")
    which.add_argument("--item-rows", metavar="FILE",
                       help="items not in the run, given by feature rows (CSV or parquet)")
    s.add_argument("--top", type=int, default=10, help="how many items per item (default 10)")
    s.add_argument("--out", help="write .csv, .parquet or .pq instead of printing")
    _list_options(s)

    li = sub.add_parser("lists", help="every user's list (or those in a file) written to parquet, for a nightly batch")
    li.add_argument("run_dir")
    li.add_argument("--out", required=True, help="parquet file to write (.parquet or .pq)")
    li.add_argument("--users", metavar="FILE",
                    help="only the users in this file: one id per line, or a table of one column (default: every user "
                         "of the run)")
    li.add_argument("--top", type=int, default=10, help="how many items per user (default 10)")
    _list_options(li)

    a = sub.add_parser("align", help="rotate a retrained run onto an older run's vectors; every score stays the same")
    a.add_argument("run_dir", help="the new run")
    a.add_argument("--reference", required=True, help="the older run whose vectors to match")
    a.add_argument("--out", required=True, help="aligned run folder to write")
    a.add_argument("--overwrite", action="store_true", help="replace an existing aligned run folder")

    rp = sub.add_parser("report", help="rewrite report.html (curves, metrics, spectrum, item map, neighbours) for a run")
    rp.add_argument("run_dir")

    w = sub.add_parser("sweep", help="train a grid of k by one penalty; choose by the validation metric")
    w.add_argument("config", help="YAML config file")
    w.add_argument("--out", required=True, help="sweep folder (cells/, sweep.csv, plots, best_config.yaml)")
    w.add_argument("--dims", nargs="+", type=int, required=True, help="values of k (model.dim), e.g. 8 16 32 64")
    w.add_argument("--penalties", nargs="+", type=float, required=True, help="values of the penalty, e.g. 1e-6 1e-5 1e-4")
    w.add_argument("--penalty-key", default="training.weight_decay", choices=("training.weight_decay", "training.id_l2"),
                   help="which penalty the grid varies (default training.weight_decay)")
    w.add_argument("--jobs", type=int, default=1, help="cells trained at once, each on cores/jobs threads (default 1)")
    w.add_argument("--baseline", action="store_true", help="also train the linear factor model in every cell")

    u = sub.add_parser("tune", help="search model and training settings within a time budget; judged by the "
                                    "validation metric")
    u.add_argument("config", help="YAML config file")
    u.add_argument("--out", required=True,
                   help="tune folder (study.db, trials/, trials.csv, trials.txt, trials.png, best.yaml); the same "
                        "command run again continues the study")
    u.add_argument("--minutes", type=float, required=True,
                   help="time budget of this run: no trial starts after it, a running one stops at its next epoch")
    u.add_argument("--trials", type=int, metavar="N",
                   help="stop once the study holds N trials, counting earlier runs' (default: use the whole budget)")
    u.add_argument("--jobs", type=int, default=1, metavar="N",
                   help="trials at once, each in its own process on cores/N threads (default 1, in this process)")

    v = sub.add_parser("serve", help="answer recommend, similar and embed requests for one run over HTTP (JSON); "
                                     "needs the serve extra")
    v.add_argument("run_dir")
    v.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1, this machine only)")
    v.add_argument("--port", type=int, default=8080, help="port to listen on (default 8080; 0 picks a free one)")
    v.add_argument("--threads", type=int, metavar="N",
                   help="requests answered at once, each on one torch thread (default: one per core)")
    v.add_argument("--item-table", metavar="FILE",
                   help="the item table that item columns and filters read, again when the file changes (default: the "
                        "run's config items.path)")
    v.add_argument("--new-items", metavar="FILE",
                   help="items not in the run, given by feature rows: embedded once at start and served beside the "
                        "run's items")

    d = sub.add_parser("demo-data", help="generate the fictional hardware-and-garden store data")
    d.add_argument("--out", required=True, help="folder to write the demo tables into")
    d.add_argument("--seed", type=int, default=7, help="generator seed (default 7)")
    return p


def _list_options(p: argparse.ArgumentParser) -> None:
    """Item columns and item filters, shared by recommend, similar and lists."""
    p.add_argument("--columns", nargs="+", metavar="NAME", default=(),
                   help="item table columns to add beside each listed item, e.g. name department price")
    p.add_argument("--only-true", nargs="+", metavar="COLUMN", default=(),
                   help="list only items where these boolean item columns are true, e.g. in_stock")
    p.add_argument("--only", nargs="+", metavar="COLUMN=VALUE", default=(),
                   help="list only items with one of these values (values of one column are alternatives; "
                        "different columns must all hold), e.g. department=garden department=tools")
    p.add_argument("--never", nargs="+", metavar="COLUMN=VALUE", default=(),
                   help="never list items with these values, e.g. brand=Acme")
    p.add_argument("--never-ids", metavar="FILE",
                   help="never list the item ids in this file (one id per line, or a table of one column)")
    p.add_argument("--item-table", metavar="FILE",
                   help="the item table that --columns and the filters read (default: the run's config items.path), "
                        "e.g. today's table with its stock column")
    p.add_argument("--new-items", metavar="FILE",
                   help="items not in the run, given by feature rows (CSV or parquet, with the item id column): "
                        "embedded from their features and listed beside the run's items")


def _item_filter(args: argparse.Namespace) -> api.ItemFilter:
    """The filter options as an ItemFilter."""
    def pairs(option: str, items) -> list:
        out = []
        for item in items:
            name, sep, value = item.partition("=")
            if not sep or not name:
                raise TowersError(f"--{option} {item!r}: expected COLUMN=VALUE, e.g. department=garden")
            out.append((name, value))
        return out

    never_ids = api.read_id_file(args.never_ids, "item") if args.never_ids else ()
    return api.ItemFilter.from_dict({"only_true": list(args.only_true), "only_values": pairs("only", args.only),
                                     "never_values": pairs("never", args.never), "never_ids": list(never_ids)})


FRAME_FORMATS = (".csv", ".parquet", ".pq")


def _check_frame_out(out: str) -> None:
    """Refuse an --out we could not write, before any work is done."""
    if Path(out).suffix.lower() not in FRAME_FORMATS:
        raise TowersError(f"{out}: unsupported output format; use .csv, .parquet or .pq")


def _id_rows(path: str, id_column: str | None):
    """Feature rows from a file, the run's id column read as written (a CSV's 0007 stays 0007, as in embed)."""
    return api.read_table(path, ids=[id_column] if id_column else ())


def _aligned(frame) -> str:
    """The list as a text table whose columns line up on a terminal also when names hold wide (East Asian)
    characters, which take two columns each. A value an item's row does not have is left blank (as the
    CSV output leaves it), not shown as NaN."""
    import pandas as pd

    with pd.option_context("display.unicode.east_asian_width", True):
        return frame.to_string(index=False, na_rep="")


def _write_frame(df, out: str) -> None:
    _check_frame_out(out)
    path = Path(out)
    if path.suffix.lower() == ".csv":
        write_atomic(path, lambda p: df.to_csv(p, index=False))
    else:
        write_atomic(path, lambda p: df.to_parquet(p, index=False))
    print(f"wrote {len(df)} rows to {path}")


def _context_pairs(items: list[str] | None) -> dict | None:
    """--context COLUMN=VALUE ... as a mapping."""
    if not items:
        return None
    out = {}
    for item in items:
        name, sep, value = item.partition("=")
        if not sep or not name:
            raise TowersError(f"--context {item!r}: expected COLUMN=VALUE, e.g. channel=app")
        out[name] = value
    return out


def _plain(value) -> str:
    """A config value as YAML would write it (true/false, 0.0012)."""
    if isinstance(value, bool) or value is None:
        return "null" if value is None else str(value).lower()
    return f"{value:.4g}" if isinstance(value, float) else str(value)


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    # one `warning: ...` line on stderr, wherever the warning came from
    print(f"warning: {message}", file=sys.stderr)


def run(args: argparse.Namespace) -> int:
    if args.command == "train":
        if args.workers != 1 and "WORLD_SIZE" not in os.environ:
            argv = ["train", args.config, "--out", args.out] + ["--overwrite"] * args.overwrite + \
                ["--resume"] * args.resume + (["--init-from", args.init_from] if args.init_from else [])
            return launch_workers(args.workers, argv)
        result = api.train(args.config, args.out, overwrite=args.overwrite, resume=args.resume, init_from=args.init_from)
        if result["metrics"] is not None:  # process 0 of a data-parallel run, or a plain run
            print(result["table"], end="")
            print(f"run folder: {result['out']}")
        return 0
    if args.command == "demo-data":
        files = api.generate_store(args.out, seed=args.seed)
        for name, path in files.items():
            print(f"{name}: {path}")
        return 0

    if args.command == "sweep":
        result = api.run_sweep(args.config, args.out, args.dims, args.penalties, args.penalty_key, args.jobs, args.baseline)
        print(result["table"], end="")
        best = result["best"]
        print(f"chosen: model.dim {best['dim']}, {args.penalty_key} {best['penalty']:g}; "
              f"config: {result['files']['best_config.yaml']}")
        return 0
    if args.command == "tune":
        result = api.run_tune(args.config, args.out, args.minutes, args.trials, args.jobs)
        print(result["table"], end="")
        best = result["best"]
        metric = next(k for k in best if k.startswith("valid_"))
        print(f"best: trial {best['trial']:03d}, {metric} {best[metric]:.4f} (epoch {best['best_epoch']}); "
              f"run folder: {result['run']}")
        changed = ", ".join(f"{k} {_plain(was)} -> {_plain(now)}" for k, (was, now) in result["changed"].items())
        print(f"changed: {changed or 'nothing (the config already held the best values)'}")
        print(f"config: {result['files']['best.yaml']}")
        return 0
    if args.command == "serve":
        from towers import service  # FastAPI and uvicorn are imported only when a server starts

        service.serve(args.run_dir, args.host, args.port, args.threads, args.item_table,
                      announce=lambda line: print(line, flush=True), new_items=args.new_items)
        return 0
    if args.command == "report":
        print(f"wrote {api.write_report(args.run_dir)}")
        return 0
    if args.command == "align":
        record = api.align_run(args.run_dir, args.reference, args.out, overwrite=args.overwrite)
        print(api.format_drift(record), end="")
        print(f"aligned run: {args.out}")
        return 0

    if args.command == "lists" and Path(args.out).suffix.lower() not in (".parquet", ".pq"):
        raise TowersError(f"{args.out}: lists are written as parquet; give an --out ending in .parquet or .pq")
    if args.command in ("recommend", "similar") and args.out:
        _check_frame_out(args.out)
    run_ = api.load(args.run_dir)
    if getattr(args, "new_items", None):  # recommend, similar, lists
        run_ = run_.with_new_items(args.new_items)
    if args.command == "evaluate":
        result = run_.evaluate(args.interactions)
        for note in result["notes"]:
            print(note, file=sys.stderr)
        if args.json:
            print(json.dumps(result["metrics"], indent=2))
        else:
            print(api.format_table(result["metrics"]), end="")
        return 0
    if args.command == "embed":
        source = args.items or args.users
        if Path(args.out).suffix.lower() not in (".parquet", ".pq"):
            raise TowersError(f"{args.out}: embeddings are written as parquet; give an --out ending in .parquet or .pq")
        count = run_.embed_file(source, args.out, "items" if args.items else "users", args.history_column,
                                args.history_separator)
        print(f"embedded {count} {'items' if args.items else 'users'} into {args.out}")
        return 0
    if args.command == "lists":
        users = api.read_id_file(args.users, "user") if args.users else None
        count = run_.write_lists(args.out, users, args.top, args.columns, _item_filter(args), args.item_table,
                                 source=args.users or "--users")
        print(f"wrote {count} rows to {args.out}")
        return 0
    if args.command in ("recommend", "similar"):
        chosen = {"columns": args.columns, "keep": _item_filter(args), "item_table": args.item_table}
        if args.command == "similar" and args.item_rows:
            frame = run_.similar_rows(_id_rows(args.item_rows, run_.bundle.candidate_encoders.id_column), args.top,
                                      source=args.item_rows, **chosen)
        elif args.command == "similar":
            frame = run_.similar(args.items, args.top, **chosen)
        elif args.history_column and not args.user_rows:
            raise TowersError("--history-column gives the histories of --user-rows; use it with --user-rows")
        elif args.user_rows:
            frame = run_.recommend_rows(_id_rows(args.user_rows, run_.bundle.query_encoders.id_column), args.top,
                                        args.history_column,
                                        separator=args.history_separator, source=args.user_rows, **chosen)
        elif args.history:
            frame = run_.recommend_history(args.history, args.top, context=_context_pairs(args.context), **chosen)
        else:
            frame = run_.recommend(args.users, args.top, context=_context_pairs(args.context), **chosen)
        if args.out:
            _write_frame(frame, args.out)
        else:  # an empty list (a filter nothing passes) prints its header, not pandas' "Empty DataFrame"
            print(_aligned(frame) if len(frame) else "  ".join(map(str, frame.columns)))
        return 0
    raise AssertionError(args.command)


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    with warnings.catch_warnings():
        warnings.simplefilter("always")
        warnings.showwarning = _show_warning  # restored when the block ends
        try:
            return run(args)
        except TowersError as exc:
            label = "interrupted" if exc.exit_code == 130 else "error"
            print(f"{label}: {exc}", file=sys.stderr)
            return exc.exit_code
        except KeyboardInterrupt:
            print("error: interrupted", file=sys.stderr)
            return 130
        except BrokenPipeError:
            # the reader stopped early (`| head`): quiet, as other command-line tools are, with their code
            # 128 + SIGPIPE; stdout goes to /dev/null so the interpreter's final flush cannot fail again
            os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
            return 141


if __name__ == "__main__":
    raise SystemExit(main())
