"""The ``forkmap`` command line: argument parsing only; the work is done by the stages."""

from __future__ import annotations

import argparse
import logging
import sys
from collections.abc import Sequence
from pathlib import Path

from pipeline.errors import ForkmapError

__all__ = ["main"]

log = logging.getLogger("forkmap")


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="forkmap", description="Whole-brain imaging during "
                                "target choice: from TIFF volumes and a rig log to decoders "
                                "and tuning maps.")
    p.add_argument("--verbose", "-v", action="store_true", help="debug logging; tracebacks")
    p.add_argument("--quiet", "-q", action="store_true", help="warnings and errors only")
    sub = p.add_subparsers(dest="command", required=True)

    r = sub.add_parser("run", help="run every stage that is not up to date")
    r.add_argument("config", type=Path)
    g = r.add_mutually_exclusive_group()
    g.add_argument("--only", metavar="STAGE", help="run this stage only")
    g.add_argument("--from", dest="from_stage", metavar="STAGE",
                   help="re-run this stage and everything downstream")
    r.add_argument("--force", action="store_true", help="re-run even up-to-date stages")

    c = sub.add_parser("check", help="validate a config and its input files; runs nothing")
    c.add_argument("config", type=Path)

    s = sub.add_parser("status", help="table of stages: done / stale / missing")
    s.add_argument("config", type=Path)

    rep = sub.add_parser("report", help="(re)write the HTML report")
    rep.add_argument("config", type=Path)

    e = sub.add_parser("export", help="export the session")
    e.add_argument("config", type=Path)
    e.add_argument("--nwb", action="store_true", required=True, help="write <output>/session.nwb")
    e.add_argument("--embed-volumes", action="store_true",
                   help="copy the volumes into the NWB file instead of linking them")
    return p


def _setup_logging(verbose: bool, quiet: bool, output: Path | None = None) -> None:
    level = logging.DEBUG if verbose else logging.WARNING if quiet else logging.INFO
    log.setLevel(logging.DEBUG)
    log.propagate = False
    for h in list(log.handlers):        # a previous run's handlers (tests call main twice)
        log.removeHandler(h)
        h.close()
    console = logging.StreamHandler(sys.stderr)
    console.setLevel(level)
    console.setFormatter(logging.Formatter("forkmap: %(message)s"))
    log.addHandler(console)
    if output is not None:
        output.mkdir(parents=True, exist_ok=True)
        fh = logging.FileHandler(output / "forkmap.log", encoding="utf-8")
        fh.setLevel(logging.DEBUG)
        fh.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s"))
        log.addHandler(fh)


def _dispatch(args: argparse.Namespace) -> int:
    from pipeline.config import load_config

    settings = load_config(args.config)
    if args.command == "check":
        from pipeline.checks import check_inputs

        for line in check_inputs(settings):
            print(line)
        print(f"{args.config}: config and inputs look valid")
        return 0
    _setup_logging(args.verbose, args.quiet, settings.session.output)
    if args.command == "run":
        from pipeline.stages import run_stages

        result = run_stages(settings, only=args.only, from_stage=args.from_stage,
                            force=args.force, quiet=args.quiet)
        for name, what in result:
            log.info("%-10s %s", name, what)
        out = settings.session.output
        log.info("results in %s", out)
        if (out / "report" / "index.html").exists():
            log.info("report: %s", out / "report" / "index.html")
        return 0
    if args.command == "status":
        from pipeline.stages import status_rows

        rows = status_rows(settings)
        cols = ("stage", "state", "when", "seconds", "warnings")
        widths = {c: max(len(c), *(len(r[c]) for r in rows)) for c in cols}
        print("  ".join(c.ljust(widths[c]) for c in cols))
        for r in rows:
            print("  ".join(r[c].ljust(widths[c]) for c in cols))
        return 0
    if args.command == "report":
        from pipeline.stages import run_stages

        run_stages(settings, only="report", force=True, quiet=args.quiet)
        print(settings.session.output / "report" / "index.html")
        return 0
    if args.command == "export":
        from pipeline.export import export_nwb
        from pipeline.store import Store

        path = export_nwb(settings, Store(settings.session.output, create=False),
                          embed_volumes=args.embed_volumes)
        print(path)
        return 0
    raise AssertionError(args.command)  # pragma: no cover


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``forkmap`` console script; returns the exit code."""
    args = _parser().parse_args(argv)
    _setup_logging(args.verbose, args.quiet)
    try:
        return _dispatch(args)
    except ForkmapError as exc:
        if args.verbose:
            log.exception("error")
        print(f"forkmap: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("forkmap: interrupted; run the same command again to resume", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
