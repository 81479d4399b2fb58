"""Command line: ``strayline run | process | refit | status | alerts | why | summary |
check-config | demo | products | calibrate | cut``.

Exit codes: 0 ok, 2 usage, 78 (EX_CONFIG) for a bad configuration, 1 for anything else
that stopped a command.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import sys
from collections.abc import Sequence
from pathlib import Path

from strayline import __version__
from strayline.errors import EXIT_CONFIG, EXIT_LOCKED, EXIT_OK, EXIT_USAGE, ConfigError, StoreError

__all__ = ["build_parser", "main"]

_CONFIG_ENV = "STRAYLINE_CONFIG"


def _config_arg(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "-c",
        "--config",
        type=Path,
        default=os.environ.get(_CONFIG_ENV),
        help=f"YAML config file (default: ${_CONFIG_ENV})",
    )


def _positive_int(text: str) -> int:
    """An argument that must be a whole number >= 1."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number; found {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1; found {value}")
    return value


def _seconds(text: str) -> float:
    """An argument that must be a finite number of seconds >= 0."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number of seconds; found {text!r}") from None
    if not 0.0 <= value < float("inf"):
        raise argparse.ArgumentTypeError(f"must be a finite number >= 0; found {text}")
    return value


def _positive_number(text: str) -> float:
    """An argument that must be a finite number > 0."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number; found {text!r}") from None
    if not 0.0 < value < float("inf"):
        raise argparse.ArgumentTypeError(f"must be a finite number > 0; found {text}")
    return value


def _degrees(text: str) -> float:
    """An argument that must be a finite angle in degrees."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be an angle in degrees; found {text!r}") from None
    if not abs(value) < float("inf"):
        raise argparse.ArgumentTypeError(f"must be a finite angle; found {text}")
    return value


def _point_nm(text: str) -> tuple[float, float]:
    """An argument X,Y in nanometres, returned in metres."""
    try:
        x_text, y_text = text.split(",")
        x, y = float(x_text), float(y_text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be X,Y in nm; found {text!r}") from None
    if not (abs(x) < float("inf") and abs(y) < float("inf")):
        raise argparse.ArgumentTypeError(f"must be finite; found {text}")
    return x * 1e-9, y * 1e-9


def _state_dir_arg(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--state-dir",
        type=Path,
        default=None,
        metavar="DIR",
        help="the state folder holding calibrations/ (default: --config's paths.state_dir, "
        "else the one the store recorded)",
    )


_FAULT_KINDS = "<fault kinds>"


class _DemoHelp(argparse.HelpFormatter):
    """Fills in the demo instrument's fault kinds when help is printed: importing the demo
    instrument to build the parser would delay every command's start (and ``run``'s early
    stop handler) by its imports."""

    def _expand_help(self, action: argparse.Action) -> str:
        text = super()._expand_help(action)
        if _FAULT_KINDS in text:
            from demo_stream import FAULT_KINDS

            text = text.replace(_FAULT_KINDS, ", ".join(FAULT_KINDS))
        return text


def _fault(text: str) -> str:
    """A demo fault spec, checked by the demo instrument's own parser (imported lazily)."""
    from demo_stream import parse_fault

    try:
        parse_fault(text)
    except ValueError as error:
        raise argparse.ArgumentTypeError(str(error)) from None
    return text


def _parallel_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--workers",
        type=_positive_int,
        default=None,
        metavar="N",
        help="cores to use: scans side by side, one core each (default: every core)",
    )
    parser.add_argument(
        "--scheduler",
        metavar="ADDRESS",
        help="run the scans on the Dask cluster of this scheduler (e.g. tcp://host:8786)",
    )


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``strayline`` command."""
    parser = argparse.ArgumentParser(
        prog="strayline",
        description=(
            "Live field maps and fault alerts for scanning NV magnetometry: watch scan-line "
            "files, fit every ODMR spectrum, write the field into a zarr store, alert."
        ),
    )
    parser.add_argument("--version", action="version", version=f"strayline {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    run = sub.add_parser("run", help="run the daemon in the foreground (systemd or by hand)")
    _config_arg(run)

    process = sub.add_parser(
        "process", help="process every line file below DIR once with the daemon's pipeline"
    )
    process.add_argument(
        "folder", type=Path, metavar="DIR", help="folder holding scan folders of line files"
    )
    _parallel_args(process)
    _config_arg(process)

    refit = sub.add_parser(
        "refit",
        help="fit archived scans again from their stored raw spectra into new stores",
    )
    refit.add_argument(
        "source",
        type=Path,
        metavar="SOURCE",
        help="a scan store (<scan>.zarr) or a folder with stores below it; only read",
    )
    refit.add_argument(
        "--out",
        type=Path,
        required=True,
        metavar="DIR",
        help="folder for the new stores, their products, state and alert log",
    )
    _parallel_args(refit)
    _config_arg(refit)

    status = sub.add_parser("status", help="per scan: lines done/planned, rate, ETA, alerts")
    _config_arg(status)
    status.add_argument("--json", action="store_true", help="one JSON object per scan")
    status.add_argument(
        "--utc", action="store_true", help="times in UTC (default: this machine's time zone)"
    )

    alerts = sub.add_parser("alerts", help="readable tail of the alert log")
    _config_arg(alerts)
    alerts.add_argument("--follow", "-f", action="store_true", help="keep printing new alerts")
    alerts.add_argument("--scan", metavar="ID", help="only this scan")
    alerts.add_argument(
        "--since",
        metavar="TIME",
        help="only alerts at or after this ISO 8601 time, or this long ago (30m, 1h, 2d)",
    )
    alerts.add_argument(
        "--active", action="store_true", help="only alerts raised and not cleared since"
    )
    alerts.add_argument(
        "--severity",
        choices=("info", "warning", "critical"),
        help="only alerts of this severity and more urgent ones",
    )
    alerts.add_argument(
        "--utc", action="store_true", help="times in UTC (default: this machine's time zone)"
    )
    alerts.add_argument(
        "--json", action="store_true", help="print the JSON lines as stored (every detail)"
    )
    alerts.add_argument("-n", "--lines", type=int, default=20, help="how many (default 20)")

    summary = sub.add_parser(
        "summary",
        help="write one HTML page (and Markdown) over the scans of the last hours: images, "
        "lines, fit yield, alerts, duration, rate",
    )
    _config_arg(summary)
    summary.add_argument(
        "--since",
        metavar="TIME",
        default="12h",
        help="scans with a line or an alert since this long ago (12h, 30m, 2d) or this ISO "
        "8601 time (default 12h)",
    )
    summary.add_argument(
        "--out",
        type=Path,
        default=None,
        metavar="DIR",
        help="folder for the page, its Markdown and its images (default: <output_root>/summaries)",
    )
    summary.add_argument(
        "--utc", action="store_true", help="times in UTC (default: this machine's time zone)"
    )

    why = sub.add_parser(
        "why", help="why each rule did or did not raise on one line of a scan (its decisions)"
    )
    _config_arg(why)
    why.add_argument("scan", metavar="SCAN", help="the scan id")
    why.add_argument("line", type=int, metavar="LINE", help="the line index")
    why.add_argument(
        "--direction", choices=("forward", "backward"), help="one trace only (default: both)"
    )
    why.add_argument("--rule", metavar="NAME", help="one rule only")
    why.add_argument("--json", action="store_true", help="print the records as stored")

    check = sub.add_parser("check-config", help="validate a config file and its profiles")
    check.add_argument(
        "file",
        type=Path,
        metavar="FILE",
        nargs="?",
        default=None,
        help=f"the YAML config to check (default: --config, or ${_CONFIG_ENV})",
    )
    _config_arg(check)

    demo = sub.add_parser(
        "demo",
        help="run the demo instrument and the daemon on a short scan with a fault",
        formatter_class=_DemoHelp,
    )
    demo.add_argument("--lines", type=_positive_int, default=48, help="scan lines (default 48)")
    demo.add_argument(
        "--pixels", type=_positive_int, default=128, help="pixels per line (default 128)"
    )
    demo.add_argument(
        "--pace", type=_seconds, default=0.25, help="seconds between lines (default 0.25)"
    )
    demo.add_argument(
        "--fault",
        type=_fault,
        default=None,
        help=(
            "fault to inject as KIND@LINE[:PIXEL], e.g. tip_crash@30:64; kinds: "
            f"{_FAULT_KINDS} (default: a tip crash two thirds in)"
        ),
    )
    demo.add_argument("--folder", type=Path, default=None, help="work folder (default: a temp one)")
    demo.add_argument("--seed", type=int, default=7, help="noise seed (default 7)")

    products = sub.add_parser(
        "products",
        help="(re)make a scan's quick-look images, vector field, sheet moment and report",
    )
    products.add_argument("store", type=Path, metavar="STORE", help="the scan's <scan_id>.zarr")
    products.add_argument(
        "--standoff-nm",
        type=_positive_number,
        default=None,
        metavar="NM",
        help="NV-sample distance, nm, for the sheet moment (default: the scan's "
        "products.standoff_nm; none: the sheet moment is skipped)",
    )
    products.add_argument(
        "--out",
        type=Path,
        default=None,
        metavar="DIR",
        help="folder for the products (default: <scan_id>.products beside the store)",
    )
    products.add_argument(
        "--nv-theta-deg",
        type=_degrees,
        default=None,
        metavar="DEG",
        help="NV axis polar angle, degrees (default: as recorded for the scan)",
    )
    products.add_argument(
        "--nv-phi-deg",
        type=_degrees,
        default=None,
        metavar="DEG",
        help="NV axis azimuth, degrees (default: as recorded for the scan)",
    )
    products.add_argument(
        "--calibration",
        metavar="NAME",
        default=None,
        help="take the standoff (and its 1-sigma) from a tip calibration: latest (of the "
        "scan's tip_id), a name, NAME/RECORD or a record file (default: the scan's "
        "products.calibration)",
    )
    _state_dir_arg(products)
    products.add_argument("--no-images", action="store_true", help="skip the PNG images")

    calibrate = sub.add_parser(
        "calibrate",
        help="fit the tip's standoff on a scan of a known structure; keep it as a calibration",
    )
    calibrate.add_argument(
        "store", type=Path, metavar="STORE", help="the calibration scan's <scan_id>.zarr"
    )
    calibrate.add_argument(
        "--model",
        choices=("film-edge", "stripe", "wire"),
        required=True,
        help="the structure: a film edge, a stripe (two edges) or a straight wire",
    )
    calibrate.add_argument(
        "--name", metavar="NAME", help="keep it under this name (default: the scan's tip_id)"
    )
    calibrate.add_argument(
        "--known-strength-ma",
        type=_positive_number,
        default=None,
        metavar="MA",
        help="the structure's known M_s t (film) or current (wire), mA: held, not fitted",
    )
    calibrate.add_argument(
        "--thickness-nm",
        type=_positive_number,
        default=None,
        metavar="NM",
        help="film thickness, nm (default: a thin film, t << d)",
    )
    calibrate.add_argument("--fit-theta", action="store_true", help="also fit the NV polar angle")
    calibrate.add_argument("--fit-phi", action="store_true", help="also fit the NV azimuth")
    calibrate.add_argument(
        "--direction", choices=("forward", "backward"), help="the trace to fit (default forward)"
    )
    _state_dir_arg(calibrate)
    _config_arg(calibrate)
    calibrate.add_argument("--no-figure", action="store_true", help="skip the check figure")
    calibrate.add_argument("--json", action="store_true", help="print the record as written")

    cut = sub.add_parser(
        "cut",
        help="fit a domain wall (or film edge) along a line cut through a scan",
    )
    cut.add_argument("store", type=Path, metavar="STORE", help="the scan's <scan_id>.zarr")
    cut.add_argument(
        "--from-nm", type=_point_nm, metavar="X,Y", help="start of the cut, nm (scan frame)"
    )
    cut.add_argument("--to-nm", type=_point_nm, metavar="X,Y", help="end of the cut, nm")
    cut.add_argument(
        "--kind", choices=("wall", "edge"), default="wall", help="the model (default wall)"
    )
    cut.add_argument(
        "--width-px", type=_positive_int, default=1, help="band width, pixels (default 1)"
    )
    cut.add_argument(
        "--half-length-nm",
        type=_positive_number,
        default=None,
        metavar="NM",
        help="half-length of the automatic cut (no --from-nm/--to-nm), nm (default 5 d)",
    )
    cut.add_argument(
        "--standoff-nm",
        type=_positive_number,
        default=None,
        metavar="NM",
        help="NV-sample distance, nm (default: the scan's calibration or standoff)",
    )
    cut.add_argument(
        "--calibration", metavar="NAME", help="a tip calibration, as for `strayline products`"
    )
    _state_dir_arg(cut)
    _config_arg(cut)
    cut.add_argument(
        "--direction", choices=("forward", "backward"), help="the trace (default forward)"
    )
    cut.add_argument("--name", metavar="NAME", help="names the files cut_<NAME>.json/.png")
    cut.add_argument(
        "--out",
        type=Path,
        default=None,
        metavar="DIR",
        help="folder for the files (default: <scan_id>.products beside the store)",
    )
    cut.add_argument("--no-image", action="store_true", help="skip the PNG")
    return parser


def _need_config(args: argparse.Namespace) -> Path:
    if args.config is None:
        raise ConfigError(
            None, "--config", f"no config file given (use --config or ${_CONFIG_ENV})"
        )
    return Path(args.config)


def _load(args: argparse.Namespace):  # type: ignore[no-untyped-def]
    from strayline.config import load_config

    return load_config(_need_config(args))


def _configure_logs(config) -> None:  # type: ignore[no-untyped-def]
    from strayline.logs import configure_logging

    configure_logging(
        level=config.logging.level,
        console=config.logging.console,
        json_file=config.logging.json_file,
    )


def _cmd_run(args: argparse.Namespace) -> int:
    # A stop request while the daemon is still starting (systemd may stop a unit that is
    # still importing its libraries) is remembered and handed to the service once it
    # exists, which then exits cleanly before its first line.
    early: list[int] = []
    for signum in (signal.SIGTERM, signal.SIGINT):
        signal.signal(signum, lambda n, _f: early.append(n))
    from strayline.service import AlreadyRunning, Service, StateLock

    config = _load(args)
    try:  # one daemon per state folder, for its whole life
        lock = StateLock(config.paths.state_dir)
    except AlreadyRunning as error:
        print(f"strayline: {error}", file=sys.stderr)
        return EXIT_LOCKED
    except OSError as error:
        print(
            f"strayline: cannot lock the state folder {config.paths.state_dir}: {error}",
            file=sys.stderr,
        )
        return 1
    try:
        _configure_logs(config)
        service = Service(config)
        service.install_signal_handlers()
        if early:
            service.request_stop()
        return service.run()
    finally:
        lock.release()


def _cmd_process(args: argparse.Namespace) -> int:
    from strayline.pipeline import default_workers, process_folder

    config = _load(args)
    _configure_logs(config)
    workers = args.workers if args.workers is not None else default_workers()
    summary = process_folder(
        config, args.folder, workers=workers, scheduler=args.scheduler, progress=sys.stderr
    )
    print(_summary_text(summary, args.scheduler, "files"))
    return EXIT_OK


def _summary_text(summary, scheduler: str | None, what: str) -> str:  # type: ignore[no-untyped-def]
    where = f"on {scheduler}" if scheduler else f"{summary.workers} worker(s)"
    return (
        f"{summary.files} {what}: {summary.written} written, {summary.duplicates} already "
        f"done, {summary.quarantined} quarantined, {summary.vanished} vanished; "
        f"{summary.pixels_failed} pixel fits failed; {summary.alerts} alert events; "
        f"{summary.scans} scan(s) in {summary.wall_s:.1f} s, {where}"
    )


def _cmd_refit(args: argparse.Namespace) -> int:
    from strayline.pipeline import default_workers, refit_stores

    config = _load(args)
    _configure_logs(config)
    workers = args.workers if args.workers is not None else default_workers()
    summary = refit_stores(
        config,
        args.source,
        args.out,
        workers=workers,
        scheduler=args.scheduler,
        progress=sys.stderr,
    )
    print(_summary_text(summary, args.scheduler, "lines"))
    print(f"new stores in {args.out.absolute()}")
    return EXIT_OK


def _reader_lines(config) -> list[str]:  # type: ignore[no-untyped-def]
    """The installed readers with the files each serves, then which scan folders each
    reads (``check-config``)."""
    from strayline.lines import READER_GROUP, installed_readers

    installed = installed_readers()
    choice = config.reader_choice
    width = max(len(name) for name in installed.names)
    lines = [f"readers (entry-point group {READER_GROUP}):"]
    for name in installed.names:
        reader = installed.readers[name]
        patterns = " ".join(choice.patterns_of(reader))
        lines.append(f"  {name:<{width}}  {patterns}  {reader.summary} [{installed.origins[name]}]")
    for glob, reader in choice.rules:
        patterns = " ".join(choice.patterns_of(reader))
        lines.append(f"scan folders matching {glob!r}: {reader.name} reads {patterns}")
    default = choice.default
    which = "other scan folders" if choice.rules else "every scan folder"
    lines.append(f"{which}: {default.name} reads {' '.join(choice.patterns_of(default))}")
    return lines


def _cmd_check_config(args: argparse.Namespace) -> int:
    from strayline.config import config_digest, load_config
    from strayline.lines import installed_readers

    file = args.file if args.file is not None else _need_config(args)
    config = load_config(file)
    available = config.available_profiles()
    folder = config.profiles_folder
    profiles = ", ".join(available) or f"none in {folder}"
    print(f"{file}: ok (digest {config_digest(config)[:12]}; profiles: {profiles})")
    for text in _reader_lines(config):
        print(text)
    for problem in installed_readers().problems:
        print(f"strayline: warning: {problem}", file=sys.stderr)
    if folder != config.profiles_dir:
        print(
            f"strayline: warning: no sample-type profile in {config.profiles_dir} "
            f"(profiles_dir is taken relative to the config file's folder); using the "
            f"profiles shipped with strayline in {folder}",
            file=sys.stderr,
        )
    elif not available and "profiles_dir" in config.model_fields_set:
        print(
            f"strayline: warning: no sample-type profile in {config.profiles_dir}; "
            "profiles_dir is taken relative to the config file's folder: point it at the "
            "folder that holds the profiles (config/profiles of strayline)",
            file=sys.stderr,
        )
    return EXIT_OK


def _cmd_status(args: argparse.Namespace) -> int:
    from datetime import UTC

    from strayline.heartbeat import describe_heartbeat, pid_alive, read_heartbeat
    from strayline.status import format_scan_status, scan_statuses

    config = _load(args)
    statuses = scan_statuses(config.paths.output_root, config.paths.alert_log)
    beat = read_heartbeat(config.paths.state_dir)
    if args.json:
        if beat is not None:  # first, and only when a daemon ever ran with this state folder
            daemon = beat.as_json_dict() | {"process_present": pid_alive(beat.pid)}
            print(json.dumps({"daemon": daemon}))
        for status in statuses:
            print(json.dumps(status.as_json_dict()))
        return EXIT_OK
    if beat is not None:
        print(describe_heartbeat(beat))
    if not statuses:
        print(f"no scans in {config.paths.output_root}")
    else:
        for status in statuses:
            print(format_scan_status(status, tz=UTC if args.utc else None))
    return EXIT_OK


def _cmd_alerts(args: argparse.Namespace) -> int:
    from datetime import UTC

    from strayline.alerts import follow_alerts

    config = _load(args)
    return follow_alerts(
        config.paths.alert_log,
        scan_id=args.scan,
        since=args.since,
        severity=args.severity,
        active=args.active,
        as_json=args.json,
        follow=args.follow,
        last=args.lines,
        tz=UTC if args.utc else None,
    )


def _cmd_summary(args: argparse.Namespace) -> int:
    from datetime import UTC, datetime

    from strayline.alerts import parse_since
    from strayline.summary import read_night, write_summary

    config = _load(args)
    now = datetime.now(UTC)
    try:
        since = parse_since(args.since, now)
    except ValueError as error:
        print(f"strayline summary: {error}", file=sys.stderr)
        return EXIT_USAGE
    out = args.out if args.out is not None else config.paths.output_root / "summaries"
    night = read_night(config, since=since, until=now, config_path=_need_config(args))
    try:
        files = write_summary(night, out, tz=UTC if args.utc else None)
    except OSError as error:
        print(f"strayline summary: cannot write into {out}: {error}", file=sys.stderr)
        return 1
    active = sum(len(s.active) for s in night.scans)
    print(
        f"{len(night.scans)} scan(s), {active} alert(s) still active: {files.html} "
        f"(Markdown: {files.markdown.name})"
    )
    return EXIT_OK


def _cmd_why(args: argparse.Namespace) -> int:
    from strayline.alerts.log import printable
    from strayline.rules import format_decision, read_decisions

    config = _load(args)
    found = read_decisions(
        config.paths.state_dir,
        args.scan,
        line_index=args.line,
        direction=args.direction,
        rule=args.rule,
    )
    if not found:
        what = f"line {args.line}" + (f" ({args.direction})" if args.direction else "")
        rule = f" for rule {args.rule!r}" if args.rule else ""
        print(
            printable(
                f"strayline why: no decisions recorded for scan {args.scan!r}, {what}{rule} "
                f"(in {config.paths.state_dir / 'decisions'})"
            ),
            file=sys.stderr,
        )
        return EXIT_USAGE
    for d in found:
        if args.json:
            print(json.dumps(d.to_dict()))
        else:  # each line made safe for a terminal (a scan id may come from a folder name)
            print("\n".join(printable(row) for row in format_decision(d).split("\n")))
    return EXIT_OK


def _cmd_demo(args: argparse.Namespace) -> int:
    from strayline.demo import run_demo

    try:
        return run_demo(
            lines=args.lines,
            pixels=args.pixels,
            pace_s=args.pace,
            fault=args.fault,
            folder=args.folder,
            seed=args.seed,
        )
    except ValueError as error:  # a fault that does not fit the scan, or cannot be parsed
        print(f"strayline demo: {error}", file=sys.stderr)
        return EXIT_USAGE


def _cmd_products(args: argparse.Namespace) -> int:
    import math

    from strayline.errors import StoreError
    from strayline.products import remake_products

    given = (args.nv_theta_deg is not None, args.nv_phi_deg is not None)
    if any(given) and not all(given):
        print("strayline: give both --nv-theta-deg and --nv-phi-deg, or neither", file=sys.stderr)
        return EXIT_USAGE
    axis = (math.radians(args.nv_theta_deg), math.radians(args.nv_phi_deg)) if all(given) else None
    try:
        report = remake_products(
            args.store,
            standoff_m=None if args.standoff_nm is None else args.standoff_nm * 1e-9,
            out_dir=args.out,
            nv_axis_rad=axis,
            images=False if args.no_images else None,
            calibration=args.calibration,
            state_dir=args.state_dir,
        )
    except (StoreError, ValueError) as error:
        print(f"strayline: {error}", file=sys.stderr)
        return 1
    print(f"{report.scan_id}: {len(report.files)} products in {report.out_dir}")
    for item in report.files:
        print(f"  {item.path.name}: {item.description}")
    for skipped in report.skipped:
        print(f"  skipped {skipped.product}: {skipped.reason}")
    return EXIT_OK


def _state_dir(args: argparse.Namespace) -> Path | None:
    """--state-dir, else --config's paths.state_dir, else None (the store's own)."""
    if args.state_dir is not None:
        return Path(args.state_dir)
    if args.config is not None:
        return Path(_load(args).paths.state_dir)
    return None


def _cmd_calibrate(args: argparse.Namespace) -> int:
    from strayline.products import calibrate_store, keep_calibration

    try:
        made = calibrate_store(
            args.store,
            model=args.model,
            name=args.name,
            direction=args.direction,
            strength_a=None if args.known_strength_ma is None else args.known_strength_ma * 1e-3,
            thickness_m=None if args.thickness_nm is None else args.thickness_nm * 1e-9,
            fit_theta=args.fit_theta,
            fit_phi=args.fit_phi,
        )
        record, figure = keep_calibration(made, _state_dir(args), figure=not args.no_figure)
    except (StoreError, ValueError) as error:  # CalibrationError is a ValueError
        print(f"strayline: {error}", file=sys.stderr)
        return 1
    if args.json:
        print(json.dumps(record.to_json_dict(), indent=2))
        return EXIT_OK
    print(record.summary())
    print(f"  record {record.path}")
    if figure is not None:
        print(f"  figure {figure}")
    if record.fit.get("n_clipped"):
        print(f"  {record.fit['n_clipped']} outlier pixels left out of {record.fit['n_pixels']}")
    if not record.fit.get("converged", True):
        print(f"  warning: the fit did not converge: {record.fit['message']}")
    print(f"  use it: products.calibration: {record.name}   (or latest, for this tip)")
    return EXIT_OK


def _cmd_cut(args: argparse.Namespace) -> int:
    from strayline.products import cut_store

    if (args.from_nm is None) != (args.to_nm is None):
        print("strayline: give both --from-nm and --to-nm, or neither", file=sys.stderr)
        return EXIT_USAGE
    if args.standoff_nm is not None and args.calibration is not None:
        print("strayline: give --standoff-nm or --calibration, not both", file=sys.stderr)
        return EXIT_USAGE
    try:
        made = cut_store(
            args.store,
            args.out,
            start_m=args.from_nm,
            end_m=args.to_nm,
            kind=args.kind,
            name=args.name,
            direction=args.direction,
            width_px=args.width_px,
            half_length_m=None if args.half_length_nm is None else args.half_length_nm * 1e-9,
            standoff_m=None if args.standoff_nm is None else args.standoff_nm * 1e-9,
            calibration=args.calibration,
            state_dir=_state_dir(args),
            images=not args.no_image,
        )
    except (StoreError, ValueError) as error:
        print(f"strayline: {error}", file=sys.stderr)
        return 1
    fit = made.fit
    v, e = fit.values, fit.sigmas
    if fit.width_resolved:
        width = f"δ = {v['width_m'] * 1e9:.1f} ± {(fit.width_sigma_m or 0) * 1e9:.1f} nm"
    elif fit.width_upper_m is not None:
        width = f"δ < {fit.width_upper_m * 1e9:.0f} nm (95 %, not resolved)"
    else:
        width = "δ not bounded"
    print(
        f"{made.name}: {fit.kind} at s = {v['position_m'] * 1e9:.1f} ± "
        f"{e['position_m'] * 1e9:.2g} nm along the cut, M_s t = {v['sheet_moment_a'] * 1e3:.4g} "
        f"± {e['sheet_moment_a'] * 1e3:.2g} mA, {width}; d = {fit.standoff_m * 1e9:.1f} nm "
        f"({made.report['standoff_source']}); χ²_red = {fit.chi2_red:.3g}, "
        f"{made.samples.s_m.size} pixels"
    )
    print(f"  {made.json_path}")
    if made.png_path is not None:
        print(f"  {made.png_path}")
    return EXIT_OK


_COMMANDS = {
    "run": _cmd_run,
    "process": _cmd_process,
    "refit": _cmd_refit,
    "check-config": _cmd_check_config,
    "status": _cmd_status,
    "alerts": _cmd_alerts,
    "why": _cmd_why,
    "summary": _cmd_summary,
    "demo": _cmd_demo,
    "products": _cmd_products,
    "calibrate": _cmd_calibrate,
    "cut": _cmd_cut,
}


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``strayline`` console script; returns the exit code."""
    args = build_parser().parse_args(argv)
    try:
        code = _COMMANDS[args.command](args)
        sys.stdout.flush()  # here, where a closed pipe can still be handled
        return code
    except BrokenPipeError:  # `strayline status | head -1`: the reader has what it wanted
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())  # so the flush at exit does not fail again
        return 141  # 128 + SIGPIPE, what a shell reports for a command cut off this way
    except ConfigError as error:
        print(f"strayline: config error: {error}", file=sys.stderr)
        return EXIT_CONFIG
    except (FileNotFoundError, StoreError) as error:
        print(f"strayline: {error}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
