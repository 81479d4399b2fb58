"""A Hypothesis state machine mixing writes, crashes and reopens of a scan store.

The model is a plain dict: (line_index, direction) -> the version committed last. A
simulated crash injects a fault at a chosen point of ``write_line`` (after k of the map
writes, or in place of the commit record), then drops the store as a killed process would
(its ledger descriptor is closed, nothing else runs) and reopens it. After every reopen the
store's rows must equal the model's committed rows and every other row must hold the fill
value (common practice for crash-consistency testing: compare the system against a plain
model after injected faults; STYLE.md asks for exactly this machine).

Stores are opened with ``durable=False``: the crashes simulated here kill the process, not
the machine, so the fsync calls that guard against power loss change nothing observable.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import zarr
from hypothesis import HealthCheck, settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, initialize, invariant, rule

from strayline.field import LineField
from strayline.fit import FitStatus, LineFit
from strayline.lines import ScanLine
from strayline.store.scan_store import MAP_NAMES, ScanStore, line_rows

MEASURED = [int(FitStatus.OK), int(FitStatus.MERGED)]  # a bounded field is a measurement
N_LINES = 4
N_PIXELS = 3
SCAN_ID = "machine"
DIRECTIONS = ("forward", "backward")
KEYS = [(i, d) for i in range(N_LINES) for d in DIRECTIONS]
T0 = datetime(2031, 5, 4, 12, 0, tzinfo=UTC)
TEMPLATES: dict[int, Path] = {}  # chunk_lines -> an empty store to copy


class SimulatedCrash(Exception):
    """The process 'dies' here."""


def records(index: int, direction: str, version: int) -> tuple[ScanLine, LineFit, LineField]:
    """Deterministic records of one version of a line (same arguments, same values)."""
    rng = np.random.default_rng([index, DIRECTIONS.index(direction), version])
    n = N_PIXELS
    line = ScanLine(
        source=Path(f"/data/{SCAN_ID}/line_{index}_{direction}_v{version}.h5"),
        scan_id=SCAN_ID,
        line_index=index,
        n_lines_planned=N_LINES,
        direction=direction,  # type: ignore[arg-type]
        start_time=T0,
        end_time=T0 + timedelta(seconds=1),
        dwell_s=1.0e-3,
        nv_theta_rad=0.9553,
        nv_phi_rad=0.0,
        freq_hz=np.linspace(2.8e9, 2.9e9, 5 + version % 3),
        counts=rng.poisson(500.0, (n, 5 + version % 3)).astype(np.int64),
        x_m=np.linspace(0.0, 2e-7, n),
        y_m=index * 1e-7,
        sha256=f"{version:064x}",
    )
    pair = rng.uniform(1.0, 2.0, (n, 2))
    single = rng.uniform(1.0, 2.0, n)
    status = rng.choice([FitStatus.OK, FitStatus.MERGED], n).astype(np.uint8)
    fit = LineFit(pair * 2.8e9, pair, pair, pair, pair, pair, single, single, single, single,
                  status, np.ones(n, dtype=np.int32))  # fmt: skip
    bound = np.where(status == FitStatus.MERGED, single * 1e-4, np.nan)
    field = LineField(single * 1e-3, single, bound, single, single, single, single, single,
                      single, status)  # fmt: skip
    return line, fit, field


class _FaultyArray:
    """Wraps a zarr array; raises SimulatedCrash when the shared write budget runs out."""

    def __init__(self, array: Any, budget: list[int]) -> None:
        self._array = array
        self._budget = budget

    def __setitem__(self, key: Any, value: Any) -> None:
        if self._budget[0] == 0:
            raise SimulatedCrash
        self._budget[0] -= 1
        self._array[key] = value

    @property
    def async_array(self) -> Any:
        """The write path's seam (:func:`strayline.store._layout.write_together`)."""
        outer = self

        class _Async:
            async def setitem(self, key: Any, value: Any) -> None:
                if outer._budget[0] == 0:
                    raise SimulatedCrash
                outer._budget[0] -= 1
                await outer._array.async_array.setitem(key, value)

        return _Async()

    def __getattr__(self, name: str) -> Any:
        return getattr(self._array, name)


def simulate_crash(store: ScanStore) -> None:
    """Drop a store as a killed process would: the kernel closes its descriptors, nothing else."""
    os.close(store._ledger._fd)
    store._ledger._fd = -1


class StoreMachine(RuleBasedStateMachine):
    """Writes, crashes and reopens of one store, checked against a dict of committed versions."""

    def __init__(self) -> None:
        super().__init__()
        self.tmp = Path(tempfile.mkdtemp(prefix="strayline-store-machine-"))
        self.model: dict[tuple[int, str], int] = {}
        self.versions = iter(range(1, 10_000))
        self.store: ScanStore | None = None
        self.raw = False

    def _open(self) -> ScanStore:
        return ScanStore.open(
            self.tmp,
            SCAN_ID,
            n_lines_planned=N_LINES,
            n_pixels=N_PIXELS,
            x_m=np.linspace(0.0, 2e-7, N_PIXELS),
            config_json={},
            config_digest="0",
            raw_spectra=self.raw,
            durable=False,
        )

    def _crash_and_reopen(self) -> list[tuple[int, str]]:
        assert self.store is not None
        simulate_crash(self.store)
        self.store = self._open()
        self._check_disk()
        return self.store.recovered_lines

    def _check_disk(self) -> None:
        """Committed rows equal the model's; all other rows, y values and raw groups are empty."""
        store = self.store
        assert store is not None
        group = zarr.open_group(store.path, mode="r")
        for direction in DIRECTIONS:
            expected = {
                i: line_rows(*records(i, direction, v))
                for (i, d), v in self.model.items()
                if d == direction
            }
            for name in MAP_NAMES:
                stored = store.read_map(name, direction)
                for i in range(N_LINES):
                    if i in expected:
                        np.testing.assert_array_equal(stored[i], expected[i][name])
                    elif name == "status":
                        assert (stored[i] == 255).all(), (name, i, direction)
                    else:
                        assert np.isnan(stored[i]).all(), (name, i, direction)
            y = group[f"{direction}/y"][:]
            assert np.all(np.diff(y) > 0), y  # planned positions keep it monotonic
            for i in range(N_LINES):
                assert (y[i] == i * 1e-7) if i in expected else np.isfinite(y[i])
                raw = store.read_raw(i, direction)
                on_disk = (store.path / "raw" / direction / str(i)).exists()
                if i in expected and self.raw:
                    line = records(i, direction, self.model[(i, direction)])[0]
                    assert raw is not None
                    np.testing.assert_array_equal(raw.counts, line.counts)
                    np.testing.assert_array_equal(raw.freq_hz, line.freq_hz)
                else:
                    assert raw is None
                    assert not on_disk

    @initialize(chunk_lines=st.sampled_from([1, 3]), raw=st.booleans())
    def start(self, chunk_lines: int, raw: bool) -> None:
        shutil.copytree(TEMPLATES[chunk_lines], self.tmp / f"{SCAN_ID}.zarr")
        self.raw = raw
        self.store = self._open()
        assert self.store.recovered_lines == []

    @rule(key=st.sampled_from(KEYS), same_file=st.booleans())
    def write(self, key: tuple[int, str], same_file: bool) -> None:
        """Process a line file: skipped when it is a duplicate, written otherwise."""
        assert self.store is not None
        old = self.model.get(key)
        version = old if (same_file and old is not None) else next(self.versions)
        line = records(*key, version)
        expected = "new" if old is None else ("duplicate" if old == version else "changed")
        assert self.store.decide(line[0]) == expected
        if expected == "duplicate":
            return
        receipt = self.store.write_line(*line)
        assert receipt.superseded == (old is not None)
        self.model[key] = version

    @rule(
        key=st.sampled_from(KEYS),
        # the edges (no row written yet, every row written) half the time
        point=st.one_of(st.sampled_from([0, len(MAP_NAMES)]), st.integers(1, len(MAP_NAMES) - 1)),
    )
    def crash_while_writing(self, key: tuple[int, str], point: int) -> None:
        """Die after `point` map writes (or, past the last map, instead of the commit record)."""
        self._crash_writing([key], point)

    @rule(keys=st.lists(st.sampled_from(KEYS), min_size=2, max_size=6, unique=True))
    def write_group(self, keys: list[tuple[int, str]]) -> None:
        """Lines ready together are committed as one group: each is committed as if written
        alone, and the ledger knows them as its latest group, in order."""
        assert self.store is not None
        versions = [next(self.versions) for _ in keys]
        items = [records(*k, v) for k, v in zip(keys, versions, strict=True)]
        receipts = self.store.write_lines(items)
        assert [r.superseded for r in receipts] == [k in self.model for k in keys]
        self.model.update(zip(keys, versions, strict=True))
        assert self.store.last_group()[0] == tuple(keys)

    @rule(
        keys=st.lists(st.sampled_from(KEYS), min_size=2, max_size=6, unique=True),
        point=st.one_of(st.sampled_from([0, len(MAP_NAMES)]), st.integers(1, len(MAP_NAMES) - 1)),
    )
    def crash_while_writing_group(self, keys: list[tuple[int, str]], point: int) -> None:
        """Die after `point` map writes of a group (or, at the last, instead of its commit
        records): every line of the group is reset at reopen, none half-committed."""
        self._crash_writing(keys, point)

    def _crash_writing(self, keys: list[tuple[int, str]], point: int) -> None:
        """Write ``keys`` as one group (one key: alone), dying after ``point`` map writes
        or, at ``len(MAP_NAMES)``, instead of the commit records; then crash and reopen."""
        store = self.store
        assert store is not None
        if point < len(MAP_NAMES):
            budget = [point]
            for direction in DIRECTIONS:
                maps = store._maps[direction]
                for name in MAP_NAMES:
                    maps[name] = _FaultyArray(maps[name], budget)
        else:
            ledger = store._ledger
            real_append = ledger.append

            def append_but_commit(batch: Any) -> None:
                batch = list(batch)
                if batch[0]["event"] == "commit":
                    raise SimulatedCrash
                real_append(batch)

            ledger.append = append_but_commit  # type: ignore[method-assign]
        try:
            if len(keys) == 1:
                store.write_line(*records(*keys[0], next(self.versions)))
            else:
                store.write_lines([records(*k, next(self.versions)) for k in keys])
        except SimulatedCrash:
            pass
        else:
            raise AssertionError("the injected fault did not fire")
        for key in keys:  # a begun, uncommitted line is reset, old version or not
            self.model.pop(key, None)
        assert self._crash_and_reopen() == sorted(keys)

    @rule(key=st.sampled_from(KEYS))
    def stray_rows_then_crash(self, key: tuple[int, str]) -> None:
        """Rows that reach the maps without any ledger record are reset at reopen."""
        store = self.store
        assert store is not None
        if key in self.model:
            return
        index, direction = key
        store._maps[direction]["chi2_red"][index, 1] = 3.0
        assert self._crash_and_reopen() == [key]

    @rule()
    def crash_when_idle(self) -> None:
        """A crash between lines loses nothing and resets nothing."""
        assert self._crash_and_reopen() == []

    @rule(fragment=st.sampled_from([b'{"event":"begin","line', b"{", b"\x00\x00\x00"]))
    def torn_ledger_tail_then_crash(self, fragment: bytes) -> None:
        """A torn final ledger record (a begin cut short) changes nothing after reopen."""
        assert self.store is not None
        ledger_path = self.store._ledger.path
        size = ledger_path.stat().st_size
        with ledger_path.open("ab") as f:
            f.write(fragment)
        assert self._crash_and_reopen() == []
        assert ledger_path.stat().st_size == size

    @rule()
    def close_and_reopen(self) -> None:
        """A clean close and reopen changes nothing."""
        assert self.store is not None
        self.store.close()
        self.store = self._open()
        assert self.store.recovered_lines == []
        self._check_disk()

    @invariant()
    def ledger_matches_model(self) -> None:
        """Committed lines, their checksums and the statistics agree with the model."""
        if self.store is None:
            return
        committed = self.store.committed()
        assert {k: e.sha256 for k, e in committed.items()} == {
            k: f"{v:064x}" for k, v in self.model.items()
        }
        stats = self.store.statistics()
        assert stats.committed_forward == sum(1 for (_, d) in self.model if d == "forward")
        assert stats.committed_backward == sum(1 for (_, d) in self.model if d == "backward")
        failures = sum(
            int(np.count_nonzero(~np.isin(line_rows(*records(*k, v))["status"], MEASURED)))
            for k, v in self.model.items()
        )
        assert stats.fit_failures == failures

    def teardown(self) -> None:
        if self.store is not None and not self.store._ledger.closed:
            self.store.close()
        shutil.rmtree(self.tmp, ignore_errors=True)


@pytest.fixture(scope="module", autouse=True)
def _empty_store_templates(tmp_path_factory: pytest.TempPathFactory) -> Iterator[None]:
    """Build one empty store per chunking once; each example copies it (creation is slow)."""
    for chunk_lines in (1, 3):
        root = tmp_path_factory.mktemp(f"template{chunk_lines}")
        ScanStore.open(
            root,
            SCAN_ID,
            n_lines_planned=N_LINES,
            n_pixels=N_PIXELS,
            x_m=np.linspace(0.0, 2e-7, N_PIXELS),
            config_json={},
            config_digest="0",
            chunk_lines=chunk_lines,
            durable=False,
        ).close()
        TEMPLATES[chunk_lines] = root / f"{SCAN_ID}.zarr"
    yield
    TEMPLATES.clear()


StoreMachine.TestCase.settings = settings(
    max_examples=12,
    stateful_step_count=10,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)
TestStoreMachine = pytest.mark.slow(StoreMachine.TestCase)
