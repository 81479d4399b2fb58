"""Tests of the systemd unit (systemd/strayline.service) and its environment-file example.

Three kinds of check:

- the directives the daemon relies on, read from the unit text and held against the
  daemon's own code (exit codes from :mod:`strayline.errors`, the command line from
  :func:`strayline.cli.build_parser`, the paths of ``config/default.yaml``);
- systemd's own tools, where the machine has them: ``systemd-analyze verify`` must accept the
  unit without a single complaint, and ``systemd-analyze security --offline=yes`` must rate
  its exposure below 2.0 ("OK" or better);
- the system-call filter, emulated with strace: every call the unit's ``SystemCallFilter=``
  refuses is made to fail with EPERM (as ``SystemCallErrorNumber=EPERM`` does) while numba
  compiles, caches and runs a parallel kernel and the daemon's sd_notify sender talks to a
  socket.

Directive semantics are those of the systemd manuals systemd.unit(5), systemd.service(5),
systemd.exec(5), systemd.resource-control(5), systemd.syntax(7) and systemd.time(7).
"""

from __future__ import annotations

import os
import re
import shlex
import shutil
import socket
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from strayline.cli import build_parser
from strayline.config import load_config
from strayline.errors import EXIT_CONFIG, EXIT_LOCKED, EXIT_USAGE

REPO = Path(__file__).resolve().parents[1]
UNIT_PATH = REPO / "systemd" / "strayline.service"
ENV_EXAMPLE_PATH = REPO / "systemd" / "strayline.env.example"
DEFAULT_CONFIG_PATH = REPO / "config" / "default.yaml"
INSTALLED_COMMAND = "/opt/strayline/venv/bin/strayline"

SYSTEMD_ANALYZE = shutil.which("systemd-analyze")
STRACE = shutil.which("strace")
needs_systemd_analyze = pytest.mark.skipif(
    SYSTEMD_ANALYZE is None, reason="systemd-analyze is not installed on this machine"
)

Unit = dict[str, dict[str, list[str]]]


# --------------------------------------------------------------------------- readers


def read_unit(text: str) -> Unit:
    """Sections → key → every assigned value, in order (systemd.syntax(7)).

    Lines starting with ``#`` or ``;`` are comments; a line ending in a backslash continues
    on the next one, the backslash becoming a space; a key may be assigned many times (an
    empty assignment stays in the list, as it resets list settings in systemd).
    """
    unit: Unit = {}
    section: dict[str, list[str]] | None = None
    pending = ""
    for raw in text.splitlines():
        line = pending + raw.strip() if pending else raw.strip()
        pending = ""
        if not line or line[0] in "#;":
            continue
        if line.endswith("\\"):
            pending = line[:-1] + " "
            continue
        if line.startswith("[") and line.endswith("]"):
            section = unit.setdefault(line[1:-1], {})
            continue
        key, sep, value = line.partition("=")
        if not sep or section is None:
            raise ValueError(f"not a unit-file assignment: {line!r}")
        section.setdefault(key.strip(), []).append(value.strip())
    return unit


def read_env_file(text: str) -> dict[str, str]:
    """KEY=VALUE lines of an EnvironmentFile= (systemd.exec(5)); comments skipped."""
    env: dict[str, str] = {}
    for raw in text.splitlines():
        line = raw.strip()
        if not line or line[0] in "#;":
            continue
        key, sep, value = line.partition("=")
        if not sep:
            raise ValueError(f"not an environment assignment: {line!r}")
        value = value.strip()
        if len(value) >= 2 and value[0] == value[-1] and value[0] in "'\"":
            value = value[1:-1]
        env[key.strip()] = value
    return env


_TIME_UNITS_S = {"ms": 1e-3, "s": 1.0, "sec": 1.0, "m": 60.0, "min": 60.0, "h": 3600.0}


def timespan_s(value: str) -> float:
    """A systemd time span ("90s", "10min", "1min 30s"; a bare number is seconds)."""
    total = 0.0
    for number, unit in re.findall(r"(\d+(?:\.\d+)?)\s*([a-z]*)", value):
        total += float(number) * _TIME_UNITS_S[unit or "s"]
    return total


def size_bytes(value: str) -> int:
    """A systemd memory size ("1536M", "2G"); suffixes are powers of 1024."""
    match = re.fullmatch(r"(\d+)([KMGT]?)", value)
    assert match is not None, value
    return int(match[1]) * 1024 ** " KMGT".index(match[2] or " ")


@pytest.fixture(scope="module")
def unit() -> Unit:
    return read_unit(UNIT_PATH.read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def service(unit: Unit) -> dict[str, list[str]]:
    return unit["Service"]


def one(section: dict[str, list[str]], key: str) -> str:
    """The value of a key assigned exactly once."""
    values = section.get(key, [])
    assert len(values) == 1, f"{key}= assigned {len(values)} times: {values}"
    return values[0]


def environment(service: dict[str, list[str]]) -> dict[str, str]:
    """The unit's Environment= assignments as a mapping."""
    pairs = (item.partition("=") for line in service.get("Environment", []) for item in [line])
    return {key: value for key, _, value in pairs}


# --------------------------------------------------------------------------- the daemon's contract


def test_service_is_notify_type_and_only_the_main_process_may_notify(service):
    """The daemon announces readiness itself (Type=notify) and no child (an alert hook)
    can change the service state (NotifyAccess=main)."""
    assert one(service, "Type") == "notify"
    assert one(service, "NotifyAccess") == "main"


def test_config_and_usage_errors_are_not_restarted(service):
    """A bad config (exit 78, EX_CONFIG of sysexits.h), a bad command line (exit 2) or
    another daemon on the same state folder (exit 75) stops the service instead of
    looping, while other failures restart it."""
    prevented = one(service, "RestartPreventExitStatus").split()
    assert str(EXIT_CONFIG) in prevented
    assert str(EXIT_USAGE) in prevented
    assert str(EXIT_LOCKED) in prevented
    assert one(service, "Restart") == "on-failure"
    assert timespan_s(one(service, "RestartSec")) >= 1.0


def test_restart_rate_is_limited_in_the_unit_section(unit):
    """The start rate limit sits in [Unit], where systemd reads it (systemd.unit(5))."""
    assert timespan_s(one(unit["Unit"], "StartLimitIntervalSec")) >= 60.0
    assert 1 <= int(one(unit["Unit"], "StartLimitBurst")) <= 10
    assert "StartLimitIntervalSec" not in unit["Service"]


def test_watchdog_and_stop_timeout_leave_room_for_one_line(service):
    """The watchdog outlasts one line including the first JIT compile (about 12 s measured
    on a 2-core PC with an empty numba cache), and a stop waits at least as long, so SIGTERM
    never cuts a line the watchdog would have let finish."""
    watchdog_s = timespan_s(one(service, "WatchdogSec"))
    assert watchdog_s >= 60.0
    assert timespan_s(one(service, "TimeoutStopSec")) >= watchdog_s
    assert one(service, "KillSignal") == "SIGTERM"


def test_exec_start_is_the_run_command_of_the_cli_with_the_config_variable(service):
    """ExecStart runs ``strayline run --config ${STRAYLINE_CONFIG}``, a command line the
    daemon's own parser accepts."""
    argv = shlex.split(one(service, "ExecStart"))
    assert argv == [INSTALLED_COMMAND, "run", "--config", "${STRAYLINE_CONFIG}"]
    args = build_parser().parse_args([*argv[1:3], "/etc/strayline/config.yaml"])
    assert args.command == "run"
    assert args.config == Path("/etc/strayline/config.yaml")


def test_config_variable_is_the_one_the_cli_reads(monkeypatch):
    """STRAYLINE_CONFIG, set by the unit and the environment file, is the variable the CLI
    falls back to when --config is absent (so `strayline status` finds the same file)."""
    monkeypatch.setenv("STRAYLINE_CONFIG", "/etc/strayline/other.yaml")
    args = build_parser().parse_args(["status"])
    assert args.config == Path("/etc/strayline/other.yaml")


def test_reload_checks_the_config_then_sends_sighup(service):
    """ExecReload first runs ``strayline check-config`` on the same file (a bad file fails
    the reload visibly) and then sends SIGHUP to the main process."""
    check, signal_line = service["ExecReload"]
    check_argv = shlex.split(check)
    assert check_argv == [INSTALLED_COMMAND, "check-config", "${STRAYLINE_CONFIG}"]
    assert build_parser().parse_args([check_argv[1], "/x.yaml"]).command == "check-config"
    assert shlex.split(signal_line) == ["/bin/kill", "-HUP", "$MAINPID"]


def test_environment_sets_a_default_config_and_reads_the_optional_file(service):
    """The config path defaults to /etc/strayline/config.yaml and the environment file is
    optional (the leading '-' of EnvironmentFile=)."""
    assert environment(service)["STRAYLINE_CONFIG"] == "/etc/strayline/config.yaml"
    assert one(service, "EnvironmentFile") == "-/etc/strayline/strayline.env"


def test_jit_caches_live_in_the_cache_directory(service):
    """numba's kernel cache and matplotlib's config folder point into the unit's
    CacheDirectory (%C is /var/cache for system services, systemd.unit(5) specifiers)."""
    cache = "%C/" + one(service, "CacheDirectory") + "/"
    env = environment(service)
    assert env["NUMBA_CACHE_DIR"].startswith(cache)
    assert env["MPLCONFIGDIR"].startswith(cache)


def test_write_execute_memory_stays_allowed_for_the_jit(service):
    """MemoryDenyWriteExecute stays off: numba maps its compiled kernels writable and then
    executable (common practice for LLVM JIT engines)."""
    assert one(service, "MemoryDenyWriteExecute") == "no"


# --------------------------------------------------------------------------- identity and paths


def test_runs_as_a_fixed_user_with_group_readable_files(service):
    """A fixed user and group (not DynamicUser) and UMask=0027, so new files are 0640:
    readable by the lab's group, closed to everyone else."""
    assert one(service, "User") == "strayline"
    assert one(service, "Group") == "strayline"
    assert service.get("DynamicUser", ["no"]) == ["no"]
    umask = int(one(service, "UMask"), 8)
    assert 0o666 & ~umask == 0o640
    assert 0o777 & ~umask == 0o750


def _writable_roots(service: dict[str, list[str]]) -> list[Path]:
    roots = [Path("/var/lib") / one(service, "StateDirectory")]
    roots.append(Path("/var/cache") / one(service, "CacheDirectory"))
    roots.append(Path("/var/log") / one(service, "LogsDirectory"))
    for line in service.get("ReadWritePaths", []):
        roots.extend(Path(p.lstrip("-+")) for p in line.split())
    return roots


def test_every_path_of_the_default_config_is_writable_under_the_unit(service):
    """The watch root (quarantine moves happen there), the output root, the state folder and
    the alert log of config/default.yaml all lie below a writable place of the unit."""
    config = load_config(DEFAULT_CONFIG_PATH)
    roots = _writable_roots(service)
    paths = config.paths
    for path in (paths.watch_root, paths.output_root, paths.state_dir, paths.alert_log):
        assert any(path.is_relative_to(root) for root in roots), (path, roots)


def test_nothing_outside_the_listed_places_is_writable(service):
    """The whole file system is read-only (ProtectSystem=strict), home folders are hidden
    and the service has its own /tmp."""
    assert one(service, "ProtectSystem") == "strict"
    assert one(service, "ProtectHome") == "yes"
    assert one(service, "PrivateTmp") == "yes"
    assert "ReadOnlyPaths" not in service  # strict already makes everything else read-only


# --------------------------------------------------------------------------- hardening


def test_resources_are_bounded_for_a_two_core_lab_pc(service):
    """Memory is reclaimed above MemoryHigh and capped at MemoryMax between 1 and 4 GiB,
    and the task count is bounded."""
    high = size_bytes(one(service, "MemoryHigh"))
    cap = size_bytes(one(service, "MemoryMax"))
    assert 2**30 <= high < cap <= 4 * 2**30
    assert 16 <= int(one(service, "TasksMax")) <= 256


# --------------------------------------------------------------------------- environment file


def test_env_example_sets_the_config_the_unit_defaults_to(service):
    """The environment-file example names the same config file as the unit's default, as an
    absolute path the CLI accepts."""
    env = read_env_file(ENV_EXAMPLE_PATH.read_text(encoding="utf-8"))
    assert env["STRAYLINE_CONFIG"] == environment(service)["STRAYLINE_CONFIG"]
    assert Path(env["STRAYLINE_CONFIG"]).is_absolute()


def test_env_example_keys_are_plain_variable_names():
    """Every assignment in the example is NAME=VALUE with a shell-style variable name and
    no shell syntax (EnvironmentFile= does no expansion, systemd.exec(5))."""
    text = ENV_EXAMPLE_PATH.read_text(encoding="utf-8")
    env = read_env_file(text)
    assert env, "the example assigns nothing"
    for key, value in env.items():
        assert re.fullmatch(r"[A-Z_][A-Z0-9_]*", key), key
        assert "$" not in value
        assert "`" not in value


# --------------------------------------------------------------------------- systemd's tools


def _unit_copy(folder: Path) -> Path:
    """The unit with its command pointed at a temporary executable (verify needs one)."""
    command = folder / "strayline"
    command.write_text("#!/bin/sh\nexit 0\n", encoding="utf-8")
    command.chmod(0o755)
    copy = folder / "strayline.service"
    copy.write_text(
        UNIT_PATH.read_text(encoding="utf-8").replace(INSTALLED_COMMAND, str(command)),
        encoding="utf-8",
    )
    return copy


def _analyze(*args: str) -> subprocess.CompletedProcess[str]:
    assert SYSTEMD_ANALYZE is not None
    env = {**os.environ, "SYSTEMD_COLORS": "0", "SYSTEMD_PAGER": "", "LC_ALL": "C.UTF-8"}
    return subprocess.run(
        [SYSTEMD_ANALYZE, *args], check=False, capture_output=True, text=True, env=env, timeout=60
    )


@needs_systemd_analyze
def test_systemd_analyze_verify_accepts_the_unit_without_complaint(tmp_path):
    """``systemd-analyze verify`` loads the unit and reports nothing at all: no unknown key,
    no bad value, no missing command (systemd-analyze(1)). systemd 252 does not look the
    User= up during verify, so the absent user 'strayline' is not reported."""
    result = _analyze("verify", "--man=no", "--recursive-errors=no", str(_unit_copy(tmp_path)))
    assert result.returncode == 0, result.stderr
    assert (result.stdout + result.stderr).strip() == ""


@needs_systemd_analyze
def test_systemd_analyze_verify_catches_a_broken_copy(tmp_path):
    """The verify check can fail: a misspelt key in a copy of the unit is reported."""
    copy = _unit_copy(tmp_path)
    copy.write_text(
        copy.read_text(encoding="utf-8").replace("ProtectClock=", "ProtectClok="),
        encoding="utf-8",
    )
    result = _analyze("verify", "--man=no", "--recursive-errors=no", str(copy))
    assert "Unknown key" in result.stderr
    assert "ProtectClok" in result.stderr


_EXPOSURE = re.compile(r"Overall exposure level for strayline\.service:\s*([0-9.]+)\s+(\w+)")


@needs_systemd_analyze
def test_systemd_analyze_security_rates_the_unit_below_2(tmp_path):
    """``systemd-analyze security --offline=yes`` gives an overall exposure below 2.0, the
    "OK" band or better (systemd-analyze(1): 0–10 scale)."""
    result = _analyze("security", "--offline=yes", "--no-pager", str(_unit_copy(tmp_path)))
    assert result.returncode == 0, result.stderr
    match = _EXPOSURE.search(result.stdout + result.stderr)
    assert match is not None, result.stdout
    assert float(match[1]) < 2.0, result.stdout
    assert match[2] in {"SAFE", "OK"}


# --------------------------------------------------------------------------- the syscall filter


def _syscall_groups() -> dict[str, list[str]]:
    """systemd's syscall groups, each with its members (names and @groups)."""
    listing = _analyze("syscall-filter", "--no-pager").stdout
    groups: dict[str, list[str]] = {}
    current: list[str] | None = None
    for line in listing.splitlines():
        if line.startswith("@"):
            current = groups.setdefault(line.strip(), [])
        elif line.startswith("    ") and current is not None:
            if not line.strip().startswith("#"):
                current.append(line.strip())
        else:
            current = None
    return groups


def _expand(groups: dict[str, list[str]], token: str) -> set[str]:
    if not token.startswith("@"):
        return {token}
    return set().union(*(_expand(groups, member) for member in groups[token]))


def refused_syscalls(service: dict[str, list[str]]) -> set[str]:
    """Every known system call the unit's SystemCallFilter= lines refuse."""
    groups = _syscall_groups()
    allowed: set[str] = set()
    for line in service["SystemCallFilter"]:
        if line.startswith("~"):
            allowed -= set().union(*(_expand(groups, t) for t in line[1:].split()))
        else:
            allowed |= set().union(*(_expand(groups, t) for t in line.split()))
    return _expand(groups, "@known") - allowed


def _run_filtered(script: Path, refused: set[str], env: dict[str, str], log: Path):
    """Run ``script`` with every refused call failing with EPERM (strace fault injection)."""
    assert STRACE is not None
    probe = subprocess.run(
        [STRACE, "-qq", "-o", os.devnull, "true"], check=False, capture_output=True
    )
    if probe.returncode != 0:
        pytest.skip(f"strace cannot trace here: {probe.stderr.decode().strip()}")
    # "?name" lets strace skip names this architecture does not have.
    names = ",".join(f"?{name}" for name in sorted(refused))
    command = [STRACE, "-f", "-qq", "-o", str(log), "-e", f"trace={names}"]
    command += ["-e", f"inject={names}:error=EPERM", sys.executable, str(script)]
    return subprocess.run(
        command, check=False, capture_output=True, text=True, env=env, timeout=240
    )


_JIT_PROBE = textwrap.dedent(
    """
    import os

    import numpy as np
    import scipy.linalg  # scipy's OpenBLAS asks mbind() for NUMA placement
    from numba import njit, prange

    from strayline.service._sdnotify import Notifier


    @njit(cache=True, parallel=True)
    def sum_of_squares(x):
        total = 0.0
        for i in prange(x.size):
            total += x[i] * x[i]
        return total


    try:
        os.sched_setaffinity(0, os.sched_getaffinity(0))  # in @resources: must be refused
        print("affinity allowed")
    except PermissionError:
        print("affinity refused")
    value = sum_of_squares(np.arange(1000.0))
    print(value, Notifier().notify("READY=1", f"STATUS=probe {value:.0f}"))
    """
)


@pytest.mark.slow
@needs_systemd_analyze
@pytest.mark.skipif(STRACE is None, reason="strace is not installed on this machine")
def test_numba_jit_and_sd_notify_work_under_the_syscall_filter(service, tmp_path):
    """With every call the filter refuses failing with EPERM, numba compiles, caches and runs
    a parallel kernel, and sd_notify reaches its AF_UNIX socket; the sum of squares
    0² + … + 999² = 332 833 500 is n(n+1)(2n+1)/6 with n = 999 (common practice)."""
    script = tmp_path / "jit_probe.py"
    script.write_text(_JIT_PROBE, encoding="utf-8")
    cache = tmp_path / "numba-cache"
    notify_path = tmp_path / "notify"
    receiver = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    receiver.bind(str(notify_path))
    receiver.settimeout(5.0)
    env = {**os.environ, "NUMBA_CACHE_DIR": str(cache), "NOTIFY_SOCKET": str(notify_path)}
    env.pop("WATCHDOG_USEC", None)
    try:
        result = _run_filtered(script, refused_syscalls(service), env, tmp_path / "strace.log")
        assert result.returncode == 0, result.stderr[-3000:]
        assert result.stdout.split("\n")[:2] == ["affinity refused", "332833500.0 True"]
        assert receiver.recv(4096) == b"READY=1\nSTATUS=probe 332833500"
    finally:
        receiver.close()
    assert list(cache.rglob("*.nbi")), "numba wrote no cache index"
    assert "sched_setaffinity" in (tmp_path / "strace.log").read_text(encoding="utf-8")


_FIT_PROBE = textwrap.dedent(
    """
    import numpy as np

    from strayline.fit import FitStatus, fit_line
    from strayline.physics import lorentzian_dips

    rng = np.random.default_rng(20240611)
    freq_hz = np.linspace(2.77e9, 2.97e9, 201)
    n = 64
    centers = np.stack([np.full(n, 2.82e9), np.full(n, 2.92e9)], axis=1)
    mu = lorentzian_dips(freq_hz, centers, np.full((n, 2), 0.15), np.full(n, 10e6),
                         np.full(n, 3000.0))
    fit = fit_line(freq_hz, rng.poisson(mu))
    ok = np.asarray(fit.status) == FitStatus.OK
    error_hz = np.abs(fit.center_hz[ok] - centers[ok])
    print(int(ok.sum()), n, float(np.median(error_hz)))
    """
)


@pytest.mark.slow
@needs_systemd_analyze
@pytest.mark.skipif(STRACE is None, reason="strace is not installed on this machine")
def test_the_fit_kernels_compile_and_run_under_the_syscall_filter(service, tmp_path):
    """With an empty cache and every refused call failing with EPERM, the daemon's batched
    fitter compiles and fits a simulated line of 64 clean two-dip spectra (counts 3000,
    contrast 15 %, FWHM 10 MHz; PHYSICS.md typical values, from memory) and finds the
    centres."""
    script = tmp_path / "fit_probe.py"
    script.write_text(_FIT_PROBE, encoding="utf-8")
    env = {**os.environ, "NUMBA_CACHE_DIR": str(tmp_path / "numba-cache")}
    env.pop("NOTIFY_SOCKET", None)
    result = _run_filtered(script, refused_syscalls(service), env, tmp_path / "strace.log")
    assert result.returncode == 0, result.stderr[-3000:]
    good, total, median_error_hz = result.stdout.split()
    assert int(total) == 64
    assert int(good) >= 60  # clean, well-separated spectra: nearly every fit must converge
    # Shot-noise 1σ of a centre here is ~0.2 MHz; 1 MHz is a wide margin for the median.
    assert float(median_error_hz) < 1e6
