"""The service's heartbeat and what `strayline status` says from it."""

from __future__ import annotations

import json
import os
from datetime import UTC, datetime, timedelta
from pathlib import Path

from strayline.heartbeat import (
    HEARTBEAT_FILE,
    Heartbeat,
    describe_heartbeat,
    pid_alive,
    read_heartbeat,
    write_heartbeat,
)

T0 = datetime(2026, 12, 5, 21, 0, tzinfo=UTC)
BEAT = Heartbeat(
    pid=4242,
    state="running",
    started=T0,
    seen=T0 + timedelta(hours=2),
    lines_written=120,
    waiting=3,
    last_scan_id="night-film",
    output_failing=False,
    version="0.0",
)


def test_a_heartbeat_reads_back_as_written_and_a_damaged_one_as_none(tmp_path: Path) -> None:
    """What the service writes, status reads back; a missing or damaged file is no
    heartbeat (status then says nothing about the daemon rather than guessing)."""
    write_heartbeat(tmp_path / "state", BEAT)
    assert read_heartbeat(tmp_path / "state") == BEAT
    assert read_heartbeat(tmp_path / "nowhere") is None
    (tmp_path / "state" / HEARTBEAT_FILE).write_text("{not json", encoding="utf-8")
    assert read_heartbeat(tmp_path / "state") is None


def test_status_tells_running_silent_and_stopped_daemons_apart() -> None:
    """Seen 4 s ago: running, since when, lines written, files waiting. Not seen for
    12 min: silent, and whether its process is still there (blocked) or gone (killed).
    Stopped: when, and what that run did."""
    seen = BEAT.seen
    running = describe_heartbeat(BEAT, now=seen + timedelta(seconds=4))
    assert running == (
        "daemon: running (pid 4242) since 2026-12-05 21:00 UTC, last seen 4 s ago; "
        "120 line(s) written, 3 waiting"
    )
    late = seen + timedelta(minutes=12)
    blocked = describe_heartbeat(BEAT, now=late, alive=lambda pid: True)
    assert blocked.startswith("daemon: not seen for 12 min (pid 4242 still there: blocked?)")
    gone = describe_heartbeat(BEAT, now=late, alive=lambda pid: False)
    assert "(pid 4242 gone: killed or crashed?)" in gone
    stopped = Heartbeat(**{**BEAT.__dict__, "state": "stopped"})
    assert describe_heartbeat(stopped, now=late) == (
        "daemon: stopped at 2026-12-05 23:00 UTC (120 line(s) written in that run)"
    )


def test_pid_alive_knows_this_process_and_a_finished_one() -> None:
    """kill(pid, 0) finds this process; a child that has exited and been reaped is gone."""
    import subprocess
    import sys

    assert pid_alive(os.getpid())
    child = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                           capture_output=True, text=True, check=True)  # fmt: skip
    assert not pid_alive(int(child.stdout))


def test_status_prints_the_daemon_line_first(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    """`strayline status` starts with the daemon line when a heartbeat exists; with
    --json the first object is {"daemon": ...} with whether its process is present."""
    import yaml

    from strayline.cli import main

    config = tmp_path / "c.yaml"
    config.write_text(
        yaml.safe_dump({"paths": {"watch_root": "in", "output_root": "out"}}), encoding="utf-8"
    )
    old = Heartbeat(**{**BEAT.__dict__, "seen": datetime(2026, 1, 1, tzinfo=UTC)})
    write_heartbeat(tmp_path / "out" / ".strayline", old)
    assert main(["status", "--config", str(config)]) == 0
    first = capsys.readouterr().out.splitlines()[0]
    assert first.startswith("daemon: not seen for ")  # its last beat is long past
    assert main(["status", "--config", str(config), "--json"]) == 0
    daemon = json.loads(capsys.readouterr().out.splitlines()[0])["daemon"]
    assert (daemon["pid"], daemon["lines_written"]) == (4242, 120)
    assert "process_present" in daemon
