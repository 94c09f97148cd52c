"""The `samesource` command line. It does I/O only; the work is samesource.pipeline.analyze."""

from __future__ import annotations

import argparse
import contextlib
import json
import signal
import sys
from collections.abc import Iterator
from pathlib import Path

from samesource import __version__
from samesource.errors import InputError

EXIT_BAD_INPUT = 2


def _parser() -> argparse.ArgumentParser:
    from samesource.input.loading import READABLE  # the formats, from the registry of readers

    p = argparse.ArgumentParser(prog="samesource", description=(
        "Check survey scales' reliability and validity, test for common-method variance, "
        "and report corrected path estimates."))
    p.add_argument("--version", action="version", version=f"samesource {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    a = sub.add_parser("analyze", help="analyse a survey file with a design file; writes report.json")
    a.add_argument("data", help=f"survey data: {READABLE}")
    a.add_argument("--design", required=True, help="the study design (JSON)")
    a.add_argument("--out", default="samesource-report", help="output folder (default ./samesource-report)")
    a.add_argument("--sheet", help="worksheet of an .xlsx file (default: the sheet with the most rows "
                   "under item-like columns)")
    a.add_argument("--missing", choices=["listwise", "fiml"], default="listwise", type=str.lower,
                   help="missing answers: drop incomplete rows (default) or full-information ML")
    a.add_argument("--drop-flagged", action="store_true",
                   help="drop rows that screening flags (by default they are reported and kept)")
    a.add_argument("--fit-time-limit", type=float, default=60.0, metavar="SECONDS",
                   help="cap on the computation of each model fit, in CPU seconds of the fit (the same on a busy or idle machine; default 60)")
    a.add_argument("--bootstrap", type=int, default=None, metavar="N",
                   help="bootstrap replicates for percentile and BCa intervals (default: analytic intervals, "
                        "and 300 replicates when fewer than 200 rows are analysed; 0 for none)")
    a.add_argument("--seed", type=int, default=0, help="seed for the bootstrap and random starting values")
    a.add_argument("--confidence", type=float, default=0.95, metavar="LEVEL",
                   help="confidence level of every interval, 0.5 to 0.999 (default 0.95)")
    a.add_argument("--min-group-size", type=int, default=5, metavar="N",
                   help="no group's numbers are shown for groups smaller than this (default 5)")
    a.add_argument("--source", action="append", default=[], metavar="NAME=PATH",
                   help="the file of a second source the design names under 'sources' (manager "
                        "ratings, a later wave, records), joined on ids; repeat for each source")
    a.add_argument("--check-corrections", type=int, default=0, metavar="N",
                   help="check every correction on N simulated surveys like this one per scenario (the fitted "
                        "model and four departures from it; each is a whole analysis: minutes)")
    a.add_argument("--quiet", action="store_true",
                   help="print only where the report is (no summary, no progress lines)")

    d = sub.add_parser("draft-design", help="print a draft design inferred from the data "
                       "(column names, answers, SPSS labels); what it left out goes to stderr")
    d.add_argument("data")
    d.add_argument("--sheet", help="worksheet of an .xlsx file (default: the sheet that holds the "
                   "respondents)")

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
    tc.add_argument("--expires-days", type=float, metavar="N",
                    help="the token stops working N days from now (default: until revoked)")
    tc.add_argument("--data", metavar="DIR", help="data folder (as for serve)")
    tl = tsub.add_parser("list", help="a tenant's tokens: key id, created, last used, expiry "
                                      "(never the secret)")
    tl.add_argument("--tenant", required=True, help="tenant name")
    tl.add_argument("--data", metavar="DIR", help="data folder (as for serve)")
    tr = tsub.add_parser("revoke", help="revoke a token from the next request on")
    tr.add_argument("key_id", metavar="KEY_ID",
                    help="the token's key id (the part after ss1_, as token list shows it)")
    tr.add_argument("--data", metavar="DIR", help="data folder (as for serve)")
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


# stages whose progress counts work done (done of total), not stages
COUNTED = {"bootstrap": ("bootstrap", "replicates"), "check_corrections": ("correction check", "simulated surveys")}


class _TerminalProgress:
    """One line on stderr, rewritten in place as the stages pass; only on a terminal, so logs
    and pipes get nothing but the summary."""

    def __init__(self, stream=None) -> None:
        self.stream = stream or sys.stderr
        self.width = 0

    def __call__(self, stage: str, done: int, total: int) -> None:
        text = f"  {stage.replace('_', ' ')} {done}/{total}" if stage in COUNTED else \
            f"  {stage.replace('_', ' ')} (step {done + 1} of {total})"
        self.stream.write("\r" + text.ljust(self.width))
        self.stream.flush()
        self.width = len(text)

    def clear(self) -> None:
        if self.width:
            self.stream.write("\r" + " " * self.width + "\r")
            self.stream.flush()
            self.width = 0


class _LineProgress:
    """Plain progress lines for logs and pipes (stderr not a terminal): one per stage, and
    one per tenth of the bootstrap. The first comes once the data are read and checked
    against the design, so that bad input still gets one message alone on stderr."""

    def __init__(self, stream=None) -> None:
        self.stream = stream or sys.stderr
        self.last: tuple[str, int] | None = None

    def __call__(self, stage: str, done: int, total: int) -> None:
        if stage in COUNTED:
            tenth = (10 * done) // total if total else 10
            if self.last == (stage, tenth) or (done and tenth == 0):
                return
            self.last = (stage, tenth)
            what, unit = COUNTED[stage]
            text = f"samesource: {what} {done}/{total} {unit} ({10 * tenth}%)"
        else:
            if (self.last is not None and self.last[0] == stage) or stage == "load":
                return
            self.last = (stage, 0)
            text = f"samesource: {stage.replace('_', ' ')} (stage {min(done + 1, total)} of {total})"
        self.stream.write(text + "\n")
        self.stream.flush()

    def clear(self) -> None:
        pass


def _analyze(args: argparse.Namespace) -> int:
    from samesource import analyze
    from samesource.input.design import load_design
    from samesource.options import AnalysisOptions

    design = load_design(args.design)
    opts = AnalysisOptions.from_dict({
        "missing": args.missing, "drop_flagged": args.drop_flagged,
        "fit_time_limit": args.fit_time_limit, "seed": args.seed, "sheet": args.sheet,
        "bootstrap": args.bootstrap, "min_group_size": args.min_group_size,
        "confidence": args.confidence, "check_corrections": args.check_corrections,
    })
    sources = _source_files(args.source)
    shown = None if args.quiet else _TerminalProgress() if sys.stderr.isatty() else _LineProgress()
    try:
        report = analyze(args.data, design, options=opts, progress=shown, sources=sources)
    finally:
        if shown is not None:
            shown.clear()
    out = Path(args.out)
    held: list[int] = []
    try:
        with _uninterrupted(held):
            report.save(out)
    except OSError as e:
        raise InputError(f"cannot write the report there ({e.strerror})", code="bad_output",
                         file=str(out)) from None
    if held:  # the user asked to stop: no summary, but say where the finished report is
        print(f"samesource: {signal.Signals(held[0]).name} arrived while the report was being "
              "written; the report is complete", file=sys.stderr)
    elif not args.quiet:
        print(report.summary())
        print()
    print(f"Report: {out / 'report.html'} (data: report.json; tables: tables/ and tables.xlsx)")
    from samesource.output.summary import review_last_line

    last = review_last_line(report.to_dict())
    if last:  # the last line says so (exit 0 all the same)
        print(last)
    return 0


def _source_files(given: list[str]) -> dict[str, str]:
    """--source NAME=PATH, each name once."""
    out: dict[str, str] = {}
    for text in given:
        name, eq, path = text.partition("=")
        name, path = name.strip(), path.strip()
        if not eq or not name or not path:
            raise InputError(f"--source {text!r}: write it as NAME=PATH, the source's name in the design's "
                             "'sources' and its file, e.g. --source manager=manager_ratings.csv",
                             code="bad_option")
        if name in out:
            raise InputError(f"--source {name}=... is given twice; give each source once", code="bad_option")
        out[name] = path
    return out


def _draft(args: argparse.Namespace) -> int:
    from samesource.input.drafting import draft_from_table
    from samesource.input.loading import load_table

    table = load_table(args.data, sheet=args.sheet)
    draft = draft_from_table(table)
    print(json.dumps(draft.design, indent=2, ensure_ascii=False))
    for w in table.warnings:
        if w["code"] in ("sheet_chosen", "row_names"):
            print(f"samesource: {w['message']}", file=sys.stderr)
    for note in draft.notes:
        print(f"samesource: drafted {note}", file=sys.stderr)
    if draft.left_out:
        print(f"samesource: {len(draft.left_out)} column(s) left out:", file=sys.stderr)
        for d in draft.left_out:
            print(f"  {d['column']}: {d['reason']}", file=sys.stderr)
    if not draft.design["constructs"]:
        print("No constructs found: item columns are expected to be named stem + number "
              "(sup1, clim_2, Q3_1, Q3r1, Q3.1, ...). Write the design by hand.", file=sys.stderr)
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
    from .tokens import key_id_of

    tenant = (getattr(args, "tenant", None) or "").strip()
    if args.token_command in ("create", "list") and (not tenant or len(tenant) > 200):
        raise InputError("--tenant must be a name of 1 to 200 characters", code="bad_option")
    days = getattr(args, "expires_days", None)
    if days is not None and not 0 < days <= 36500:
        raise InputError("--expires-days must be a number of days above 0 (at most 36500)",
                         code="bad_option")
    cfg = _service_config(args, run_jobs=False)
    cfg.data_dir.mkdir(parents=True, exist_ok=True)
    db = Database(cfg.sqlalchemy_url)
    try:
        db.create_schema()
        store = Store(db)
        if args.token_command == "create":
            print(store.create_token(tenant, expires_days=days))
        elif args.token_command == "list":
            rows = store.list_tokens(tenant)
            if rows is None:
                raise InputError(f"no tenant named {tenant!r}", code="not_found")
            for t in rows:
                state = "revoked " + t["revoked_at"] if t["revoked_at"] else "active"
                print(f"{t['key_id']}  created {t['created_at']}  last used "
                      f"{t['last_used_at'] or 'never'}  expires {t['expires_at'] or 'never'}  "
                      f"{state}")
        else:
            key_id = args.key_id.strip()
            if key_id.startswith("ss1_"):  # a whole token pasted: its key id
                key_id = key_id_of(key_id) or key_id.split("_")[1]
            done = store.revoke_token(key_id)
            if done is None:
                raise InputError(f"no token has the key id {key_id[:40]!r}; see: samesource "
                                 "token list --tenant NAME", code="not_found")
            print(f"token {key_id} {'revoked' if done else 'was already revoked'}")
    finally:
        db.dispose()
    return 0


def _database_errors() -> tuple[type[BaseException], ...]:
    try:
        from sqlalchemy.exc import SQLAlchemyError
    except ImportError:  # pragma: no cover - sqlalchemy is a dependency
        return ()
    return (SQLAlchemyError,)


def _out_of_memory(e: BaseException, data: str) -> str:
    """What to say when reading or analysing a file ran out of memory (a reader's "cannot
    open" raised while handling a MemoryError included): the limit that was met and what to
    do, as the service's 413 for an upload over SAMESOURCE_PARSE_MEMORY_MB does."""
    import resource

    where = getattr(e, "file", None) or data
    soft, _hard = resource.getrlimit(resource.RLIMIT_AS)
    if soft != resource.RLIM_INFINITY:
        limit = f"the limit on this process's memory, {soft / 2**20:,.0f} MB (ulimit -v)"
    else:
        free = _available_mb()
        limit = "the memory free on this machine" + (f" (about {free:,.0f} MB now)" if free else "")
    what = "reading the file" if isinstance(e, InputError) else "the analysis"
    return (f"{where}: {what} ran out of memory: it needs more than {limit}. Save the data as "
            ".csv or .parquet (read with far less memory than a workbook), remove the rows or "
            "columns the analysis does not use, or run it where more memory is free")


def _available_mb() -> float | None:
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemAvailable:"):
                return int(line.split()[1]) / 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


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
    except (InputError, MemoryError) as e:
        from .uploads import ran_out_of_memory

        if args.command in ("analyze", "draft-design") and ran_out_of_memory(e):
            print(f"samesource: {_out_of_memory(e, args.data)}", file=sys.stderr)
            return EXIT_BAD_INPUT
        if isinstance(e, MemoryError):
            raise
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
