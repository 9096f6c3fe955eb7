"""Command-line interface: ``areamap <subcommand> ...``.

The CLI is a thin layer over the public API; every number it prints can be
obtained from Python. Each subcommand is one ``_cmd_<name>(args) -> int``
function and one small block in :func:`_build_parser`.

Exit codes
----------
0
    Success.
1
    Unexpected internal error (a bug; please report it). Set the environment
    variable ``AREAMAP_DEBUG=1`` to see the traceback.
2
    The input, configuration or a parameter is unusable; the message says why
    and how to fix it.
3
    The operating system refused an operation (disk full, no permission, a
    read-only or vanished folder, a move across file systems); the message
    names the path. A bulletin publishes transactionally, so the previous
    bulletin folder and the archive are left as they were.

Everything printed that may contain user text (names from the input files,
paths) passes through :func:`visible`: control characters (terminal escape
sequences, bidirectional overrides) are shown as ``\\x1b``-style escapes, never
sent to the terminal.
"""

from __future__ import annotations

import argparse
import errno
import os
import re
import sys
import traceback
import warnings
from collections.abc import Sequence
from pathlib import Path

from . import __version__
from .errors import AreamapError, AreamapWarning

__all__ = ["main", "visible"]

# C0 controls except newline and tab, DEL, C1 controls, and the Unicode bidirectional overrides/isolates that
# can make a terminal line read differently from its bytes.
_CONTROL = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\u200e\u200f\u202a-\u202e\u2066-\u2069]")


def visible(text: object) -> str:
    r"""User text made safe for a terminal: control characters shown as escapes (``'\x1b'``).

    Examples
    --------
    >>> visible("Ashby\x1b[31m red")
    'Ashby\\x1b[31m red'
    >>> visible("two\nlines")
    'two\nlines'
    """
    def esc(m: re.Match) -> str:
        c = ord(m.group(0))
        return f"\\x{c:02x}" if c < 0x100 else f"\\u{c:04x}"

    return _CONTROL.sub(esc, str(text))


def _say(text: object = "", *, err: bool = False) -> None:
    print(visible(text), file=sys.stderr if err else sys.stdout, flush=err)



# --------------------------------------------------------------------------- subcommands
def _cmd_check(args: argparse.Namespace) -> int:
    """Validate a run configuration and its input files; print a compact summary."""
    from .config import load_config
    from .intake import check_study

    config = load_config(args.config)
    report = check_study(config, period=args.period)
    _say(report.summary())
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    """Write the invented demo region and run the bulletin on its last two weeks."""
    from .demo import write_demo

    config_path = write_demo(Path(args.out), seed=args.seed)
    _say(f"Demo data written to {config_path.parent}")
    _say(f"Run configuration: {config_path}")
    result = _demo_bulletins(config_path, Path(args.out) / "bulletin")
    _say(result.summary())
    _say(f"Open {result.out / 'index.html'} in a browser; history: areamap history {config_path}")
    return 0


def _demo_bulletins(config_path: Path, out: Path):
    """Run the bulletin on the demo for its last two weeks (archiving both), so the history shows."""
    from .bulletin import run_bulletin
    from .config import load_config
    from .demo import DEMO_LAST_WEEK
    from .intake import weeks_ending

    config = load_config(config_path)
    progress = _progress_printer(False)
    result = None
    for week in weeks_ending(DEMO_LAST_WEEK, 2):
        result = run_bulletin(config, period=week, out=out, progress=progress)
    return result


def _progress_printer(quiet: bool):
    """Progress lines on stderr, only on an interactive terminal and without --quiet."""
    if quiet or not sys.stderr.isatty():
        return None
    return lambda message: _say(message, err=True)


def _cmd_bulletin(args: argparse.Namespace) -> int:
    """Run the weekly bulletin for one period and write its folder."""
    from .bulletin import run_bulletin

    result = run_bulletin(args.config, period=args.period, out=args.out, public=args.public,
                          replace_public=args.replace_public, progress=_progress_printer(args.quiet))
    if not args.quiet:
        _say(result.summary())
    else:
        for note in result.notes:  # what publishing repaired is always reported
            _say(f"note: {note}", err=True)
    return 0


def _cmd_history(args: argparse.Namespace) -> int:
    """Print a district's (or every recently flagged district's) recent periods from the archive."""
    from .archive import HistoryArchive
    from .config import load_config
    from .errors import ArchiveError

    config = load_config(args.config)
    archive = HistoryArchive(config.output.archive_path)
    if not archive.path.exists():
        raise ArchiveError(
            f"No history archive at {archive.path} yet. Run 'areamap bulletin {args.config}' first."
        )
    table = archive.history(area=args.area, last=args.last)
    weekly = None
    if not table.empty:
        windows = {p: (archive.settings(p) or {}).get("window_weeks") for p in table["period"].unique()}
        table.insert(1, "window_weeks", table["period"].map(windows))
        from .errors import AreamapError
        from .intake import load_study

        try:  # weekly counts from the cases file; the archive alone is enough when it cannot be read
            weekly = load_study(config).weekly_cases()
        except AreamapError:
            weekly = None
    _say(_history_text(table, area=args.area, last=args.last, weekly=weekly))
    return 0


def _history_text(table, *, area, last: int, weekly=None) -> str:
    """Plain-text table of archived periods (counts as archived, unsuppressed: for analysts)."""
    who = f"area {area}" if area else "districts flagged"
    head = f"History ({who}, last {last} archived period(s)):"
    if table.empty:
        return head + "\n(no flagged districts in these periods)"
    cols = ["period", "window_weeks", "area_id", "area_name", "observed", "expected", "rr", "p_above_1",
            "week_observed", "forecast_mean", "forecast_high", "cluster", "flag", "flag_change", "weeks_flagged"]
    shown = table[[c for c in cols if c in table.columns]].copy()
    for c, digits in (("expected", 1), ("rr", 2), ("p_above_1", 2), ("forecast_mean", 1), ("forecast_high", 0),
                      ("week_observed", 0)):
        if c in shown:
            shown[c] = shown[c].map(lambda x, d=digits: "" if x is None or x != x else f"{x:.{d}f}")
    shown["flag"] = shown["flag"].map({True: "yes", False: "no"})
    if "area_name" in shown:
        shown["area_name"] = shown["area_name"].map(_short_name)
    if "week_observed" in shown and (shown["week_observed"] == "").all():
        shown = shown.drop(columns=["week_observed", "forecast_mean", "forecast_high"], errors="ignore")
    return head + "\n" + shown.to_string(index=False) + "\n\n" + _trend_lines(table, weekly=weekly, last=last)
def _flag_letter(row) -> str:
    """One character per period: E emerging, P persistent, C cluster or other rule, . not flagged."""
    if not row.get("flag", False):
        return "."
    if row.get("emerging", False):
        return "E"
    if row.get("persistent", False):
        return "P"
    return "C" if str(row.get("cluster", "")) == "High-High" else "F"


def _trend_lines(table, *, weekly=None, last: int = 8) -> str:
    """Compact trend per district, one column per week (oldest first): the week's count and its flag.

    Counts come from the cases file (``weekly``: areas x ISO weeks) when given, else from the
    archive (each period's newest-week count); weeks without an archived period show a blank flag.
    """
    from .intake import weeks_ending

    newest = str(table["period"].max())
    weeks = weeks_ending(newest, max(last, 1))
    lines = [f"Weekly trend, {weeks[0]} to {weeks[-1]} (count per week; flag per archived week: E emerging, "
             "P persistent, C High-High cluster, F other rule, . not flagged, blank not archived):"]
    for area, rows in table.groupby("area_id", sort=True):
        by_week = {str(r["period"]): r for r in rows.to_dict("records")}
        if weekly is not None and area in weekly.index:
            counts = [int(weekly.at[area, w]) if w in weekly.columns else None for w in weeks]
        else:
            col = "week_observed" if "week_observed" in rows and rows["week_observed"].notna().any() else "observed"
            counts = [by_week[w].get(col) if w in by_week else None for w in weeks]
        cells = ["-" if v is None or v != v else str(int(v)) for v in counts]
        flags = [_flag_letter(by_week[w]) if w in by_week else " " for w in weeks]
        width = max(len(c) for c in cells)
        name = str(rows["area_name"].iloc[-1]) if "area_name" in rows else ""
        lines.append(f"  {area} {name}")
        lines.append("    counts " + " ".join(c.rjust(width) for c in cells))
        lines.append("    flags  " + " ".join(f.rjust(width) for f in flags))
    return "\n".join(lines)


#: Longest name printed on the terminal; the tables keep full names.
NAME_DISPLAY_LIMIT = 40


def _short_name(name: object) -> str:
    text = "" if name is None else str(name)
    return text if len(text) <= NAME_DISPLAY_LIMIT else text[: NAME_DISPLAY_LIMIT - 1] + "…"


# --------------------------------------------------------------------------- parser
def _build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="areamap",
        description=(
            "Disease mapping for area-aggregated case counts: check inputs, build the "
            "weekly bulletin, explore an invented demo region."
        ),
    )
    parser.add_argument("--version", action="version", version=f"areamap {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    # check
    p = sub.add_parser(
        "check",
        help="validate a run configuration and its input files",
        description=(
            "Read the run configuration and every file it names, check ids, counts, "
            "weeks, age groups and geometries, build the neighbour graph and print a "
            "compact summary. Exit code 0 when the inputs are usable, 2 otherwise."
        ),
    )
    p.add_argument("config", help="path to the run configuration (TOML), e.g. run.toml")
    p.add_argument("--period", default=None,
                   help="check for this ISO week (as given to 'areamap bulletin --period'); default: [period] week")
    p.set_defaults(func=_cmd_check)

    # demo
    p = sub.add_parser(
        "demo",
        help="write an invented demo region and run the bulletin on it",
        description=(
            "Write invented districts (GeoPackage), weekly case counts, population by "
            "age group, the true relative risks and a ready run.toml to a folder, then run "
            "the bulletin on its last two weeks (DIR/bulletin for the latest; both archived in "
            "DIR/history.sqlite). All names and numbers are invented."
        ),
    )
    p.add_argument("--out", required=True, help="output folder (created if missing)")
    p.add_argument("--seed", type=int, default=20261202, help="random seed (default: 20261202)")
    p.set_defaults(func=_cmd_demo)

    # bulletin
    p = sub.add_parser(
        "bulletin",
        help="run the weekly bulletin for one period (index.html, areas.csv, areas.gpkg, run.json)",
        description=(
            "Intake and checks, expected counts and ratios, empirical-Bayes and CAR smoothing, "
            "Moran's I, local clusters, hotspot flags compared with the previous period, figures "
            "and outputs; the period is then added to the history archive. Exit code 0 on success, "
            "2 on unusable input (nothing is written then), 1 on an internal error."
        ),
    )
    p.add_argument("config", help="path to the run configuration (TOML), e.g. run.toml")
    p.add_argument("--period", default=None,
                   help="ISO week ending the analysed window, e.g. 2026-W47, or 'latest' (default: [period] week)")
    p.add_argument("--out", default=None,
                   help="output folder (default: 'bulletin' beside the configuration); each period goes into its own "
                        "subfolder (OUT/2026-W47/) and OUT/latest.html points to the newest")
    p.add_argument("--public", action="store_true",
                   help="also suppress small counts in areas.csv and areas.gpkg (the HTML always does)")
    p.add_argument("--replace-public", action="store_true",
                   help="allow a run without --public to replace a folder written by a --public run")
    p.add_argument("--quiet", action="store_true", help="print nothing on success (for scheduled runs)")
    p.set_defaults(func=_cmd_bulletin)

    # history
    p = sub.add_parser(
        "history",
        help="print a district's recent periods (or every recently flagged district) from the archive",
        description=(
            "Read the history archive named by [output] archive and print, as a plain table, the "
            "recent periods of one district (--area) or of every district flagged in those periods."
        ),
    )
    p.add_argument("config", help="path to the run configuration (TOML)")
    p.add_argument("--area", default=None, help="area id (default: every district flagged in the periods)")
    p.add_argument("--last", type=int, default=8, help="number of most recent archived periods (default: 8)")
    p.set_defaults(func=_cmd_history)

    return parser


# --------------------------------------------------------------------------- entry point
def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    """Print project warnings as one 'warning: ...' line; others in Python's format."""
    stream = file if file is not None else sys.stderr
    if issubclass(category, AreamapWarning):
        text = f"warning: {visible(message)}\n"
    else:
        text = warnings.formatwarning(message, category, filename, lineno, line)
    try:
        stream.write(text)
    except OSError:  # pragma: no cover - stderr closed
        pass


_OS_REASONS = {
    errno.ENOSPC: "the disk is full",
    errno.EDQUOT: "the disk quota is exhausted",
    errno.EACCES: "permission denied",
    errno.EPERM: "operation not permitted",
    errno.EROFS: "the file system is read-only",
    errno.EXDEV: "the move crosses file systems",
    errno.ENOENT: "a file or folder disappeared during the run",
    errno.EIO: "an input/output error of the disk",
}


def _os_error_text(exc: OSError) -> tuple[int, str]:
    """Exit code and a plain message for an error of the operating system (not a bug of areamap)."""
    where = " ".join(str(p) for p in (exc.filename, exc.filename2) if p)
    if exc.errno == errno.ELOOP:
        return 2, (f"error: {where or 'a path'} is a symbolic link that points back to itself. Fix the link "
                   "or give the real path.")
    reason = _OS_REASONS.get(exc.errno, exc.strerror or str(exc))
    return 3, (f"error: the system refused an operation: {reason}" + (f" ({where})" if where else "")
               + ". Fix the cause and run again; the previous bulletin folder and the history archive were "
               "left as they were.")


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``areamap`` command line and return the exit code.

    Parameters
    ----------
    argv : sequence of str, optional
        Arguments without the program name; defaults to ``sys.argv[1:]``.

    Returns
    -------
    int
        0 on success, 2 for unusable input or configuration, 3 when the
        operating system refused an operation (disk full, permissions), 1 for
        an unexpected internal error.

    Examples
    --------
    >>> main(["--help"])  # doctest: +ELLIPSIS
    usage: areamap ...
    0
    """
    parser = _build_parser()
    try:
        args = parser.parse_args(None if argv is None else list(argv))
    except SystemExit as exc:  # --help, --version, or a usage error
        code = exc.code
        return code if isinstance(code, int) else (0 if code is None else 2)
    if getattr(args, "func", None) is None:
        parser.print_help(sys.stderr)
        return 2

    debug = os.environ.get("AREAMAP_DEBUG", "") not in ("", "0")
    old_show = warnings.showwarning
    warnings.showwarning = _show_warning
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("default", AreamapWarning)
            warnings.showwarning = _show_warning
            return int(args.func(args))
    except AreamapError as exc:
        if debug:
            traceback.print_exc()
        _say(f"error: {exc}", err=True)
        return 2
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # Output piped into a program that stopped reading (`areamap history ... | head`): not an error.
        # Point stdout at devnull so the interpreter's final flush does not fail again.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    except OSError as exc:
        if debug:
            traceback.print_exc()
        code, text = _os_error_text(exc)
        _say(text, err=True)
        return code
    except Exception as exc:  # noqa: BLE001 - last line of defence of the CLI
        if debug:
            traceback.print_exc()
        first = str(exc).splitlines()[0] if str(exc) else ""
        _say(
            f"internal error: {type(exc).__name__}: {first}\n"
            "This is a bug in areamap; please report it with the command you ran "
            "(set AREAMAP_DEBUG=1 to see the traceback).",
            err=True,
        )
        return 1
    finally:
        warnings.showwarning = old_show


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
