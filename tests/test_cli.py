"""Tests of the command line (strayline.cli): commands, exit codes, printed text."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
import yaml

import demo_stream as ds
from strayline.alerts import AlertEvent, AlertSink, format_alert
from strayline.cli import build_parser, main
from strayline.config import load_config
from strayline.errors import EXIT_CONFIG
from strayline.pipeline import process_folder
from strayline.store._layout import LEDGER_FILE
from strayline.store._ledger import parse_records

REPO = Path(__file__).resolve().parents[1]
SCAN = "cli-scan"
COMMANDS = (
    "run",
    "process",
    "refit",
    "status",
    "alerts",
    "summary",
    "why",
    "check-config",
    "demo",
    "products",
    "calibrate",
    "cut",
)


def _write_config(tmp_path: Path, **sections: Any) -> Path:
    data: dict[str, Any] = {
        "paths": {"watch_root": "incoming", "output_root": "output"},
        "logging": {"console": "off"},
        "alerts": {"console": False},
    }
    for key, value in sections.items():
        data.setdefault(key, {}).update(value)
    path = tmp_path / "strayline.yaml"
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    return path


def _run_cli(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    """The real console entry point in a child process (its logging stays its own)."""
    env = {k: v for k, v in os.environ.items() if k not in ("NOTIFY_SOCKET", "STRAYLINE_CONFIG")}
    return subprocess.run(
        [sys.executable, "-m", "strayline", *args],
        cwd=cwd,
        env=env,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )


def _event(scan_id: str, rule: str, line: int, state: str = "raised") -> AlertEvent:
    return AlertEvent(
        time=f"2026-03-01T22:{line:02d}:00.000+00:00",
        scan_id=scan_id,
        rule=rule,
        severity="warning",
        state=state,  # type: ignore[arg-type]
        line_index=line,
        direction="forward",
        pixel_range=(3, 9),
        seen_value=0.4,
        seen_unit="",
        baseline_value=1.0,
        baseline_spread=0.05,
        confidence_z=-12.0,
        message=f"{rule} seen at line {line}",
        advice="check the optics",
    )


# -- help and usage ---------------------------------------------------------------------


def test_help_lists_every_command(capsys: pytest.CaptureFixture[str]) -> None:
    """`strayline --help` exits 0 and names every command."""
    with pytest.raises(SystemExit) as stop:
        main(["--help"])
    assert stop.value.code == 0
    out = capsys.readouterr().out
    for command in COMMANDS:
        assert f"    {command}" in out, command


def test_every_command_has_help(capsys: pytest.CaptureFixture[str]) -> None:
    """Each command answers --help with its own usage line."""
    for command in COMMANDS:
        with pytest.raises(SystemExit) as stop:
            main([command, "--help"])
        assert stop.value.code == 0
        assert capsys.readouterr().out.startswith(f"usage: strayline {command}")


def test_an_unknown_command_is_a_usage_error(capsys: pytest.CaptureFixture[str]) -> None:
    """An unknown command exits with 2 (usage) and names the choices."""
    with pytest.raises(SystemExit) as stop:
        main(["fly"])
    assert stop.value.code == 2
    assert "invalid choice: 'fly'" in capsys.readouterr().err


def test_the_parser_knows_exactly_the_commands() -> None:
    """The parser's commands are run, process, refit, status, alerts, summary, why,
    check-config, demo, products, calibrate and cut."""
    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    assert tuple(sub.choices) == COMMANDS  # type: ignore[arg-type]


# -- check-config -------------------------------------------------------------------------


def test_check_config_accepts_the_shipped_default(capsys: pytest.CaptureFixture[str]) -> None:
    """config/default.yaml checks out (its /var/lib paths need not exist) and its
    profiles are listed, then the readers."""
    default = REPO / "config" / "default.yaml"
    assert main(["check-config", str(default)]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0].startswith(f"{default}: ok (digest ")
    profiles = sorted(p.stem for p in (REPO / "config" / "profiles").glob("*.yaml"))
    assert out[0].endswith(f"profiles: {', '.join(profiles)})")
    assert out[-1] == "every scan folder: line-file reads *.h5"


def test_check_config_takes_the_config_option_or_the_environment(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """Without FILE, check-config checks --config, else $STRAYLINE_CONFIG, as every other
    command does; with neither it says how to give one."""
    default = REPO / "config" / "default.yaml"
    assert main(["check-config", "--config", str(default)]) == 0
    assert capsys.readouterr().out.startswith(f"{default}: ok (digest ")
    monkeypatch.setenv("STRAYLINE_CONFIG", str(default))
    assert main(["check-config"]) == 0
    assert capsys.readouterr().out.startswith(f"{default}: ok (digest ")
    monkeypatch.delenv("STRAYLINE_CONFIG")
    assert main(["check-config"]) == EXIT_CONFIG
    assert "no config file given (use --config or $STRAYLINE_CONFIG)" in capsys.readouterr().err


def test_demo_help_lists_the_fault_kinds(capsys: pytest.CaptureFixture[str]) -> None:
    """`demo --help` names every fault kind the demo instrument can inject."""
    from demo_stream import FAULT_KINDS

    with pytest.raises(SystemExit):
        main(["demo", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    for kind in FAULT_KINDS:
        assert kind in text


def test_check_config_names_the_file_and_key_of_a_bad_value(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A bad value exits 78 and the message names the file and the key path."""
    path = _write_config(tmp_path, fit={"fwhm_min_mhz": -1})
    assert main(["check-config", str(path)]) == EXIT_CONFIG == 78
    err = capsys.readouterr().err
    assert err.startswith(f"strayline: config error: {path}: fit.fwhm_min_mhz: ")
    assert "found the number -1" in err


def test_check_config_of_a_missing_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A config file that does not exist exits 78 naming it."""
    path = tmp_path / "nowhere.yaml"
    assert main(["check-config", str(path)]) == EXIT_CONFIG
    assert str(path) in capsys.readouterr().err


def test_check_config_of_an_unknown_profile(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A default_profile that does not exist exits 78 naming the key."""
    (tmp_path / "profiles").mkdir()
    data = yaml.safe_load(_write_config(tmp_path).read_text())
    data["default_profile"] = "no-such-sample"
    path = tmp_path / "strayline.yaml"
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    assert main(["check-config", str(path)]) == EXIT_CONFIG
    assert f"{path}: default_profile: unknown profile 'no-such-sample'" in capsys.readouterr().err


# -- run ---------------------------------------------------------------------------------


def test_run_with_a_bad_config_exits_78_before_doing_anything(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """`strayline run` with an invalid config exits 78 and creates no folder or file."""
    path = _write_config(tmp_path, fit={"fwhm_min_mhz": -1}, logging={"json_file": "out.log"})
    before = sorted(p.name for p in tmp_path.iterdir())
    assert main(["run", "--config", str(path)]) == EXIT_CONFIG
    assert sorted(p.name for p in tmp_path.iterdir()) == before
    assert "fit.fwhm_min_mhz" in capsys.readouterr().err


def test_run_without_a_config_exits_78(
    capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """`strayline run` with neither --config nor $STRAYLINE_CONFIG exits 78 saying so."""
    monkeypatch.delenv("STRAYLINE_CONFIG", raising=False)
    assert main(["run"]) == EXIT_CONFIG
    assert capsys.readouterr().err == (
        "strayline: config error: --config: no config file given "
        "(use --config or $STRAYLINE_CONFIG)\n"
    )


def test_the_config_may_come_from_the_environment(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """$STRAYLINE_CONFIG stands in for --config."""
    path = _write_config(tmp_path)
    monkeypatch.setenv("STRAYLINE_CONFIG", str(path))
    assert main(["status"]) == 0
    assert capsys.readouterr().out == f"no scans in {tmp_path / 'output'}\n"


# -- process -----------------------------------------------------------------------------


@pytest.mark.slow
def test_process_prints_the_summary_and_a_rerun_writes_nothing(tmp_path: Path) -> None:
    """`strayline process DIR` over a demo scan prints what it did; run again, every file is
    already done."""
    ds.run_scan(
        ds.DemoConfig(scene=ds.labyrinth(), n_lines=6, n_pixels=16, seed=4, scan_id=SCAN),
        tmp_path / "incoming",
        tmp_path / "truth",
    )
    (tmp_path / "incoming" / SCAN / "line_00009_fwd.h5").write_bytes(b"broken")
    config = _write_config(tmp_path)
    first = _run_cli("process", str(tmp_path / "incoming"), "--config", str(config), cwd=tmp_path)
    assert first.returncode == 0, first.stderr
    assert first.stdout.splitlines()[-1].startswith(
        "7 files: 6 written, 0 already done, 1 quarantined, 0 vanished; "
        f"{_failed(tmp_path)} pixel fits failed; 1 alert events; 1 scan(s) in "
    )
    assert first.stdout.splitlines()[-1].endswith(" s, 1 worker(s)")  # one scan: no cluster
    assert first.stderr.splitlines()[-1].startswith("scans 1/1 · lines 7/7 · ")
    again = _run_cli("process", str(tmp_path / "incoming"), "--config", str(config), cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    assert again.stdout.splitlines()[-1].startswith(
        "6 files: 0 written, 6 already done, 0 quarantined, 0 vanished; "
        "0 pixel fits failed; 0 alert events; 1 scan(s) in "
    )


def _failed(tmp_path: Path) -> int:
    import numpy as np
    import zarr

    status = np.asarray(
        zarr.open_group(tmp_path / "output" / f"{SCAN}.zarr", mode="r")["forward/status"][:]
    )
    from strayline.fit import failed_fits

    return int(np.count_nonzero((status != 255) & failed_fits(status)))


@pytest.mark.slow
def test_process_of_a_missing_folder_exits_1(tmp_path: Path) -> None:
    """`strayline process` on a folder that does not exist exits 1 naming it."""
    config = _write_config(tmp_path)
    missing = tmp_path / "nowhere"
    result = _run_cli("process", str(missing), "--config", str(config), cwd=tmp_path)
    assert result.returncode == 1
    assert str(missing) in result.stderr


def test_an_identical_rerun_adds_nothing_to_the_store(tmp_path: Path) -> None:
    """process_folder run twice over the same files reports all duplicates and leaves the
    ledger and the alert log byte for byte as they were (common practice: idempotent
    reprocessing)."""
    ds.run_scan(
        ds.DemoConfig(scene=ds.labyrinth(), n_lines=5, n_pixels=16, seed=9, scan_id=SCAN),
        tmp_path / "incoming",
        tmp_path / "truth",
    )
    config = load_config(_write_config(tmp_path))
    first = process_folder(config, tmp_path / "incoming")
    ledger = config.paths.output_root / f"{SCAN}.zarr" / LEDGER_FILE
    ledger_bytes = ledger.read_bytes()
    log_bytes = config.paths.alert_log.read_bytes() if config.paths.alert_log.exists() else b""
    second = process_folder(config, tmp_path / "incoming")
    assert (first.written, first.duplicates) == (5, 0)
    assert (second.files, second.written, second.duplicates, second.alerts) == (5, 0, 5, 0)
    assert ledger.read_bytes() == ledger_bytes
    after = config.paths.alert_log.read_bytes() if config.paths.alert_log.exists() else b""
    assert after == log_bytes
    records, _ = parse_records(ledger_bytes, "ledger")
    assert sum(r["event"] == "commit" for r in records) == 5


# -- alerts ------------------------------------------------------------------------------


def _alert_log(tmp_path: Path) -> tuple[Path, list[AlertEvent]]:
    config = _write_config(tmp_path)
    events = [
        _event("scan-a", "fluorescence_lost", 3),
        _event("scan-b", "tip_crash", 4),
        _event("scan-a", "fluorescence_lost", 7, "cleared"),
    ]
    sink = AlertSink(load_config(config).paths.alert_log)
    for event in events:
        sink.deliver(event)
    sink.close()
    return config, events


def test_alerts_for_one_scan_are_readable_lines(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """`strayline alerts --scan ID` prints that scan's events as readable lines."""
    config, events = _alert_log(tmp_path)
    capsys.readouterr()  # drop the sink's own log lines
    assert main(["alerts", "--config", str(config), "--scan", "scan-a"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out == [format_alert(events[0]), format_alert(events[2])]
    assert main(["alerts", "--config", str(config), "--scan", "scan-a", "--utc"]) == 0
    assert capsys.readouterr().out.splitlines()[0] == (
        "2026-03-01T22:03:00+00:00 WARN scan-a line 3 px 3–8 fluorescence_lost: "
        "fluorescence_lost seen at line 3 (z −12.0)"
    )


def test_alerts_json_and_count(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """`strayline alerts --json -n 1` prints the last stored JSON line as it is."""
    config, events = _alert_log(tmp_path)
    capsys.readouterr()  # drop the sink's own log lines
    assert main(["alerts", "--config", str(config), "--json", "-n", "1"]) == 0
    assert capsys.readouterr().out == events[-1].to_json() + "\n"


def test_alerts_with_a_bad_since_is_a_usage_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """`strayline alerts --since yesterday` exits 2 and shows the expected form."""
    config, _ = _alert_log(tmp_path)
    assert main(["alerts", "--config", str(config), "--since", "yesterday"]) == 2
    assert "--since must be an ISO 8601 time" in capsys.readouterr().err


@pytest.mark.slow
def test_output_cut_short_by_a_closed_pipe_ends_quietly(tmp_path: Path) -> None:
    """`strayline alerts | head -1` on a long log: the reader closes the pipe early, and
    strayline ends with 141 (128 + SIGPIPE, as a shell reports it) and no traceback."""
    config = _write_config(tmp_path)
    log = tmp_path / "output" / "alerts.jsonl"
    log.parent.mkdir(parents=True)
    event = _event("night-run", "fluorescence_lost", 1)
    log.write_text("".join(event.to_json() + "\n" for _ in range(3000)), encoding="utf-8")
    reader = subprocess.Popen(["head", "-1"], stdin=subprocess.PIPE, stdout=subprocess.PIPE)
    writer = subprocess.run(
        [sys.executable, "-m", "strayline", "alerts", "-c", str(config), "-n", "3000"],
        stdout=reader.stdin,
        stderr=subprocess.PIPE,
        text=True,
        timeout=60,
        check=False,
    )
    assert reader.stdin is not None
    assert reader.stdout is not None
    reader.stdin.close()
    with reader.stdout:
        first = reader.stdout.read()
    reader.wait(10)
    assert first.count(b"\n") == 1
    assert writer.returncode == 141
    assert "Traceback" not in writer.stderr
    assert "BrokenPipeError" not in writer.stderr


def test_a_copy_of_the_default_config_in_a_clean_folder_works_as_the_readme_says(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """README step 2: copy config/default.yaml, set the two paths. The state folder and the
    alert log then follow output_root (null in the file means the default below it), an
    unquoted YAML `off` for the console is taken as meant, and with no profile folder
    beside the copy the shipped profiles are used, with a warning saying so."""
    text = (REPO / "config" / "default.yaml").read_text(encoding="utf-8")
    text = text.replace("/var/lib/strayline/incoming", str(tmp_path / "incoming"))
    text = text.replace("/var/lib/strayline/scans", str(tmp_path / "scans"))
    text = text.replace("  console: auto", "  console: off")  # YAML reads this as false
    copy = tmp_path / "my.yaml"
    copy.write_text(text, encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    assert main(["check-config", str(copy)]) == 0
    captured = capsys.readouterr()
    shipped = sorted(p.stem for p in (REPO / "config" / "profiles").glob("*.yaml"))
    assert captured.out.splitlines()[0].endswith(f"profiles: {', '.join(shipped)})")
    assert captured.err == (
        f"strayline: warning: no sample-type profile in {tmp_path / 'profiles'} (profiles_dir "
        "is taken relative to the config file's folder); using the profiles shipped with "
        f"strayline in {REPO / 'config' / 'profiles'}\n"
    )
    config = load_config(copy)
    assert config.paths.state_dir == tmp_path / "scans" / ".strayline"
    assert config.paths.alert_log == tmp_path / "scans" / "alerts.jsonl"
    assert config.logging.console == "off"
    assert config.available_profiles() == tuple(shipped)
    assert config.with_profile(shipped[0]).source == REPO / "config" / "profiles" / (
        f"{shipped[0]}.yaml"
    )


def test_why_prints_the_decisions_of_one_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """`strayline why SCAN LINE` prints each rule's decision on that line (the last one
    recorded where a line was judged twice); --rule narrows it, --json prints the
    records as stored; a line without records is a usage error naming the folder."""
    from strayline.rules import DecisionLog, RuleDecision, format_decision

    config = _write_config(tmp_path)
    state_dir = tmp_path / "output" / ".strayline"

    def record(line: int, rule: str, verdict: str, **extra: Any) -> RuleDecision:
        return RuleDecision(
            time="2026-03-01T22:00:00.000+00:00",
            scan_id="scan-a",
            line_index=line,
            direction="forward",
            rule=rule,
            verdict=verdict,  # type: ignore[arg-type]
            **extra,
        )

    first = record(7, "resonance_jump", "quiet")
    again = record(7, "resonance_jump", "counting", raise_cond=True, count=1, needed=2)
    other = record(7, "fluorescence_lost", "quiet", seen_value=1.9e5, seen_unit="counts/s")
    log = DecisionLog(state_dir)
    log.append([record(6, "resonance_jump", "quiet"), first, other])
    log.append([again])  # the line judged again after a restart
    assert main(["why", "--config", str(config), "scan-a", "7"]) == 0
    out = capsys.readouterr().out
    assert out == format_decision(other) + "\n" + format_decision(again) + "\n"
    assert "counting (1 of 2 lines)" in out
    assert main(["why", "--config", str(config), "scan-a", "7", "--rule", "resonance_jump"]) == 0
    assert capsys.readouterr().out == format_decision(again) + "\n"
    assert main(["why", "--config", str(config), "scan-a", "7", "--json", "--rule", "fluo"]) == 2
    assert "no decisions recorded for scan 'scan-a', line 7 for rule 'fluo'" in (
        capsys.readouterr().err
    )
    assert main(["why", "--config", str(config), "scan-a", "6", "--json"]) == 0
    assert RuleDecision.from_dict(json.loads(capsys.readouterr().out)) == record(
        6, "resonance_jump", "quiet"
    )


def test_building_the_parser_does_not_import_the_demo_instrument() -> None:
    """The parser is built before any command runs (and before `run` can take a stop
    request): the demo instrument's imports are left to the demo and its help."""
    code = (
        "import sys, strayline.cli; strayline.cli.build_parser(); "
        "print('demo_stream' in sys.modules)"
    )
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=60
    )
    assert result.stdout.strip() == "False"
