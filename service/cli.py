"""The `samesource` command line. It does I/O only; the work is measurement.pipeline.analyze."""

from __future__ import annotations

import argparse
import contextlib
import json
import signal
import sys
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path

from measurement import __version__
from measurement.errors import InputError

EXIT_BAD_INPUT = 2


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="samesource", description=(
        "Check survey scales' reliability and validity, test for common-method variance, "
        "and report corrected path estimates."))
    p.add_argument("--version", action="version", version=f"samesource {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    a = sub.add_parser("analyze", help="analyse a survey file with a design file; writes report.json")
    a.add_argument("data", help="survey data: .csv, .tsv, .txt, .xlsx or .sav")
    a.add_argument("--design", required=True, help="the study design (JSON)")
    a.add_argument("--out", default="samesource-report", help="output folder (default ./samesource-report)")
    a.add_argument("--sheet", help="worksheet of an .xlsx file (default: the first)")
    a.add_argument("--missing", choices=["listwise", "fiml"], default="listwise",
                   help="missing answers: drop incomplete rows (default) or full-information ML")
    a.add_argument("--drop-flagged", action="store_true",
                   help="drop rows that screening flags (by default they are reported and kept)")
    a.add_argument("--fit-time-limit", type=float, default=60.0, metavar="SECONDS",
                   help="time cap for each model fit (default 60)")
    a.add_argument("--bootstrap", type=int, default=None, metavar="N",
                   help="bootstrap replicates for percentile and BCa intervals (default: analytic intervals, "
                        "and 300 replicates when fewer than 200 rows are analysed; 0 for none)")
    a.add_argument("--seed", type=int, default=0, help="seed for the bootstrap and random starting values")
    a.add_argument("--confidence", type=float, default=0.95, metavar="LEVEL",
                   help="confidence level of every interval, 0.5 to 0.999 (default 0.95)")
    a.add_argument("--min-group-size", type=int, default=5, metavar="N",
                   help="no group's numbers are shown for groups smaller than this (default 5)")
    a.add_argument("--quiet", action="store_true", help="print only where the report is")

    d = sub.add_parser("draft-design", help="print a draft design inferred from column names")
    d.add_argument("data")
    d.add_argument("--sheet")

    s = sub.add_parser("serve", help="run the HTTP service (waitress)")
    s.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    s.add_argument("--port", type=int, default=8000,
                   help="port (default 8000; 0 picks a free one and prints it)")
    s.add_argument("--data", metavar="DIR",
                   help="data folder: embedded database and stored uploads "
                        "(default $SAMESOURCE_DATA_DIR or ./samesource-data)")
    s.add_argument("--threads", type=int, default=8, help="request threads (default 8)")

    t = sub.add_parser("token", help="API tokens")
    tsub = t.add_subparsers(dest="token_command", required=True)
    tc = tsub.add_parser("create", help="print a new API token for a tenant (created if needed)")
    tc.add_argument("--tenant", required=True, help="tenant name")
    tc.add_argument("--data", metavar="DIR", help="data folder (as for serve)")
    return p


class Stopped(BaseException):
    """SIGTERM or SIGHUP during a run. A BaseException so that no ``except Exception`` on the
    way swallows it, and so that the local pool kills its workers instead of waiting."""

    def __init__(self, signum: int) -> None:
        super().__init__(signum)
        self.signum = signum


def _raise_stopped(signum: int, frame: object) -> None:
    raise Stopped(signum)


@contextlib.contextmanager
def stop_on_signals() -> Iterator[None]:
    """Turn SIGTERM and SIGHUP into :class:`Stopped` while the block runs (the default would
    end the process at once and leave the bootstrap's worker processes running)."""
    previous = {sig: signal.signal(sig, _raise_stopped) for sig in (signal.SIGTERM, signal.SIGHUP)}
    try:
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)


_DEFERRED = (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)


@contextlib.contextmanager
def _uninterrupted(note: list[int]) -> Iterator[None]:
    """Hold stop signals while the report files are written: never a half-written report. A
    signal that arrived meanwhile is dropped (the run is complete) and noted in ``note``."""
    signal.pthread_sigmask(signal.SIG_BLOCK, _DEFERRED)
    try:
        yield
    finally:
        pending = signal.sigpending() & set(_DEFERRED)
        note.extend(pending)
        previous = {sig: signal.signal(sig, signal.SIG_IGN) for sig in pending}
        signal.pthread_sigmask(signal.SIG_UNBLOCK, _DEFERRED)  # an ignored pending signal is discarded
        for sig, handler in previous.items():
            signal.signal(sig, handler)


class _TerminalProgress:
    """One line on stderr, rewritten in place as the stages pass; only on a terminal, so logs
    and pipes get nothing but the summary."""

    def __init__(self, stream=None) -> None:
        self.stream = stream or sys.stderr
        self.width = 0

    def __call__(self, stage: str, done: int, total: int) -> None:
        text = f"  {stage.replace('_', ' ')} {done}/{total}" if stage == "bootstrap" else \
            f"  {stage.replace('_', ' ')} (step {done + 1} of {total})"
        self.stream.write("\r" + text.ljust(self.width))
        self.stream.flush()
        self.width = len(text)

    def clear(self) -> None:
        if self.width:
            self.stream.write("\r" + " " * self.width + "\r")
            self.stream.flush()
            self.width = 0


def _analyze(args: argparse.Namespace) -> int:
    from measurement.design import load_design
    from measurement.options import AnalysisOptions
    from measurement.pipeline import analyze

    design = load_design(args.design)
    opts = AnalysisOptions.from_dict({
        "missing": args.missing, "drop_flagged": args.drop_flagged,
        "fit_time_limit": args.fit_time_limit, "seed": args.seed, "sheet": args.sheet,
        "bootstrap": args.bootstrap, "min_group_size": args.min_group_size,
        "confidence": args.confidence,
    })
    shown = _TerminalProgress() if not args.quiet and sys.stderr.isatty() else None
    try:
        result = analyze(args.data, design, opts, progress=shown)
    finally:
        if shown is not None:
            shown.clear()
    out = Path(args.out)
    held: list[int] = []
    try:
        with _uninterrupted(held):
            write_outputs(result.report, out)
    except OSError as e:
        raise InputError(f"cannot write the report there ({e.strerror})", code="bad_output",
                         file=str(out)) from None
    if held:  # the user asked to stop: no summary, but say where the finished report is
        print(f"samesource: {signal.Signals(held[0]).name} arrived while the report was being "
              "written; the report is complete", file=sys.stderr)
    elif not args.quiet:
        print(result.summary())
        print()
    print(f"Report: {out / 'report.html'} (data: report.json; tables: tables/ and tables.xlsx)")
    return 0


def write_outputs(report: dict, out: Path) -> None:
    """report.json, report.html, brief.html and the tables (CSV per table, and one workbook) in ``out``."""
    from measurement.brief import render_brief
    from measurement.html_report import render_html
    from measurement.report import dumps
    from measurement.tables import report_tables, tables_csv, tables_xlsx

    out.mkdir(parents=True, exist_ok=True)
    when = datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
    (out / "report.json").write_text(dumps(report), encoding="utf-8")
    (out / "report.html").write_text(render_html(report, when=when), encoding="utf-8")
    (out / "brief.html").write_text(render_brief(report, when=when), encoding="utf-8")
    tables = report_tables(report)
    folder = out / "tables"
    folder.mkdir(exist_ok=True)
    for name, text in tables_csv(tables).items():
        (folder / name).write_text(text, encoding="utf-8")
    (out / "tables.xlsx").write_bytes(tables_xlsx(tables))


def _draft(args: argparse.Namespace) -> int:
    from measurement.design import draft_design
    from measurement.loading import load_table
    from measurement.prepare import numeric_columns

    table = load_table(args.data, sheet=args.sheet)
    draft = draft_design(table.frame.columns, numeric=numeric_columns(table))
    print(json.dumps(draft, indent=2, ensure_ascii=False))
    if not draft["constructs"]:
        print("No constructs found: item columns are expected to be named stem + number "
              "(sup1, sup2, ...). Write the design by hand.", file=sys.stderr)
    return 0


def _service_config(args: argparse.Namespace, **extra):
    from .config import load_config

    return load_config({"data_dir": getattr(args, "data", None), **extra})


def _serve(args: argparse.Namespace) -> int:
    import logging

    from .server import serve

    logging.basicConfig(level=logging.INFO, stream=sys.stderr,
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    if not 0 <= args.port <= 65535 or args.threads < 1:
        raise InputError("--port must be 0 to 65535 and --threads at least 1", code="bad_option")
    return serve(_service_config(args), host=args.host, port=args.port, threads=args.threads)


def _token(args: argparse.Namespace) -> int:
    from .db import Database
    from .store import Store

    tenant = args.tenant.strip()
    if not tenant or len(tenant) > 200:
        raise InputError("--tenant must be a name of 1 to 200 characters", code="bad_option")
    cfg = _service_config(args, run_jobs=False)
    cfg.data_dir.mkdir(parents=True, exist_ok=True)
    db = Database(cfg.sqlalchemy_url)
    try:
        db.create_schema()
        print(Store(db).create_token(tenant))
    finally:
        db.dispose()
    return 0


def _database_errors() -> tuple[type[BaseException], ...]:
    try:
        from sqlalchemy.exc import SQLAlchemyError
    except ImportError:  # pragma: no cover - sqlalchemy is a dependency
        return ()
    return (SQLAlchemyError,)


def main(argv: list[str] | None = None) -> int:
    from .config import ConfigError

    args = _parser().parse_args(argv)
    try:
        if args.command == "analyze":
            with stop_on_signals():
                return _analyze(args)
        if args.command == "draft-design":
            return _draft(args)
        if args.command == "serve":
            return _serve(args)
        if args.command == "token":
            return _token(args)
    except ConfigError as e:
        print(f"samesource: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except _database_errors() as e:
        print(f"samesource: cannot use the database ({type(e).__name__}); check "
              "SAMESOURCE_DATABASE_URL, or the data folder's permissions", file=sys.stderr)
        return EXIT_BAD_INPUT
    except OSError as e:
        if args.command not in ("serve", "token"):
            raise
        print(f"samesource: {e.strerror or e} ({e.filename or 'data folder'})", file=sys.stderr)
        return EXIT_BAD_INPUT
    except InputError as e:
        print(f"samesource: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("samesource: interrupted; nothing was written", file=sys.stderr)
        return 130
    except Stopped as e:
        print(f"samesource: stopped by {signal.Signals(e.signum).name}; nothing was written",
              file=sys.stderr)
        return 128 + e.signum
    return 1


if __name__ == "__main__":
    sys.exit(main())
