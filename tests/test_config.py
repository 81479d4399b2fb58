"""Tests of strayline.config: the documented default, profiles, and error messages."""

from __future__ import annotations

import re
import string
import tempfile
from pathlib import Path
from typing import Any

import pytest
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import constants

from strayline.config import (
    Config,
    config_digest,
    config_from_mapping,
    load_config,
    select_profile,
)
from strayline.errors import ConfigError

REPO = Path(__file__).resolve().parents[1]
DEFAULT_YAML = REPO / "config" / "default.yaml"
PROFILES = ("antiferromagnet-thin-film", "cryogenic-2d-magnet", "ferromagnet-multilayer")

# γ_NV = g μB / h with g = 2.0028 (from memory: Loubser & van Wyk, Rep. Prog. Phys. 41,
# 1201 (1978)) and μB/h from CODATA through scipy.constants; PHYSICS.md §1.
GAMMA_NV_HZ_PER_T = 2.0028 * constants.physical_constants["Bohr magneton in Hz/T"][0]
MINIMAL = {"paths": {"watch_root": "/data/in", "output_root": "/data/out"}}


def _write(folder: Path, name: str, data: dict[str, Any] | str) -> Path:
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(data if isinstance(data, str) else yaml.safe_dump(data), encoding="utf-8")
    return path


def _error(path: Path) -> ConfigError:
    with pytest.raises(ConfigError) as info:
        load_config(path)
    return info.value


# --------------------------------------------------------------------------- default file


def test_default_yaml_loads() -> None:
    """The shipped default config loads and names the three sample-type profiles."""
    config = load_config(DEFAULT_YAML)
    assert config.source == DEFAULT_YAML
    assert config.profile is None
    assert config.profiles_dir == DEFAULT_YAML.parent / "profiles"
    assert set(PROFILES) <= set(config.available_profiles())


def test_default_yaml_states_the_real_defaults() -> None:
    """Every value written in default.yaml equals the schema default for that key."""
    documented = load_config(DEFAULT_YAML).as_json_dict()
    paths = yaml.safe_load(DEFAULT_YAML.read_text(encoding="utf-8"))["paths"]
    implied = config_from_mapping(
        {"paths": {"watch_root": paths["watch_root"], "output_root": paths["output_root"]}},
        base_dir=DEFAULT_YAML.parent,
    ).as_json_dict()
    assert documented == implied


def _key_paths(data: Any, prefix: str = "") -> set[str]:
    if not isinstance(data, dict):
        return set()
    out = set()
    for key, value in data.items():
        out.add(prefix + key)
        out |= _key_paths(value, f"{prefix}{key}.")
    return out


def test_default_yaml_lists_every_key() -> None:
    """default.yaml spells out every key of the schema, so it documents all of them."""
    written = yaml.safe_load(DEFAULT_YAML.read_text(encoding="utf-8"))
    schema = load_config(DEFAULT_YAML).as_json_dict()
    # alerts.hook is an open mapping (empty by default); its keys are documented in prose.
    assert _key_paths(written) == _key_paths(schema)


def test_default_yaml_comments_every_key() -> None:
    """Every key line in default.yaml has a comment on the line itself or just above it."""
    lines = DEFAULT_YAML.read_text(encoding="utf-8").splitlines()
    key_line = re.compile(r"^\s*([a-z_]+):")
    undocumented = [
        line
        for i, line in enumerate(lines)
        if key_line.match(line)
        and "#" not in line
        and not (i > 0 and lines[i - 1].lstrip().startswith("#"))
    ]
    assert undocumented == []


# --------------------------------------------------------------------------- profiles


@pytest.mark.parametrize("name", PROFILES)
def test_each_profile_applies(name: str) -> None:
    """Each shipped profile overlays the default config and validates as a whole."""
    base = load_config(DEFAULT_YAML)
    profiled = base.with_profile(name)
    assert profiled.profile == name
    assert profiled.source == base.profiles_dir / f"{name}.yaml"
    assert profiled.paths == base.paths  # a profile never moves the daemon's folders
    assert profiled != base


def test_antiferromagnet_window_holds_a_biased_pair() -> None:
    """The thin-film antiferromagnet window holds both resonances for a 1 mT axial bias
    plus 0.5 mT of sample field, by f± ≈ D ± γB∥ (Rondin et al., Rep. Prog. Phys. 77,
    056503 (2014); PHYSICS.md §2), with D = 2.870 GHz (from memory) and γ from CODATA."""
    fit = load_config(DEFAULT_YAML).with_profile("antiferromagnet-thin-film").fit
    assert fit.center_min_hz is not None
    assert fit.center_max_hz is not None
    shift_hz = GAMMA_NV_HZ_PER_T * 1.5e-3
    assert fit.center_min_hz < 2.870e9 - shift_hz
    assert 2.870e9 + shift_hz < fit.center_max_hz
    assert fit.shared_width


def test_ferromagnet_window_reaches_ten_millitesla() -> None:
    """The multilayer window holds both resonances of a 13 mT axial field (f± ≈ D ± γB∥,
    Rondin et al. 2014; D = 2.870 GHz from memory) and its linewidth bounds are wider."""
    base = load_config(DEFAULT_YAML)
    fit = base.with_profile("ferromagnet-multilayer").fit
    assert fit.center_min_hz is not None
    assert fit.center_max_hz is not None
    shift_hz = GAMMA_NV_HZ_PER_T * 13e-3
    assert fit.center_min_hz < 2.870e9 - shift_hz
    assert 2.870e9 + shift_hz < fit.center_max_hz
    assert fit.fwhm_max_hz > base.fit.fwhm_max_hz


def test_cryogenic_profile_fixes_low_temperature_zfs() -> None:
    """The cryogenic profile fixes D in 2.8775-2.878 GHz (from memory: Chen et al., APL
    99, 161903 (2011); PHYSICS.md §1), fits at lower counts and waits longer for files."""
    base = load_config(DEFAULT_YAML)
    cryo = base.with_profile("cryogenic-2d-magnet")
    assert cryo.field.zfs_hz is not None
    assert 2.8775e9 <= cryo.field.zfs_hz <= 2.878e9
    assert cryo.fit.min_counts < base.fit.min_counts
    assert cryo.watch.settle_s > base.watch.settle_s
    assert cryo.watch.give_up_s > base.watch.give_up_s


def test_with_profile_is_cached_and_never_stacks() -> None:
    """with_profile returns the same object for the same name, and a profile applied to a
    profiled config is applied over the base, not over the first profile."""
    base = load_config(DEFAULT_YAML)
    cryo = base.with_profile("cryogenic-2d-magnet")
    assert base.with_profile("cryogenic-2d-magnet") is cryo
    afm_via_cryo = cryo.with_profile("antiferromagnet-thin-film")
    assert afm_via_cryo is base.with_profile("antiferromagnet-thin-film")
    assert afm_via_cryo.field.zfs_mhz is None  # the cryogenic D did not leak through


def _profile_setup(tmp_path: Path, **top: Any) -> Path:
    _write(tmp_path / "profiles", "thin.yaml", {"fit": {"fwhm_max_mhz": 20.0}})
    _write(tmp_path / "profiles", "cold.yaml", {"field": {"zfs_mhz": 2877.7}})
    return _write(tmp_path, "cfg.yaml", {**MINIMAL, **top})


def test_select_profile_order(tmp_path: Path) -> None:
    """The file's profile attribute wins, then the first matching folder rule, then
    default_profile, then none."""
    rules = [
        {"folder_glob": "thin-*", "profile": "thin"},
        {"folder_glob": "*-cold", "profile": "cold"},
    ]
    config = load_config(_profile_setup(tmp_path, profile_rules=rules, default_profile="cold"))
    assert select_profile(config, "thin-sample-cold", "cold") == "cold"
    assert select_profile(config, "thin-sample-cold", None) == "thin"
    assert select_profile(config, "thin-sample-cold", "  ") == "thin"
    assert select_profile(config, "sample-cold", None) == "cold"
    assert select_profile(config, "other", None) == "cold"
    bare = load_config(_profile_setup(tmp_path, profile_rules=rules))
    assert select_profile(bare, "other", None) is None
    assert select_profile(bare, "THIN-x", None) is None  # matching is case-sensitive


def test_unknown_profile_lists_the_available_ones(tmp_path: Path) -> None:
    """Asking for a missing profile names it and lists what exists, nearest first."""
    config = load_config(_profile_setup(tmp_path))
    with pytest.raises(ConfigError) as info:
        config.with_profile("thn")
    assert str(info.value) == (
        f"{tmp_path / 'profiles'}: profile: unknown profile 'thn'; did you mean 'thin'? "
        f"(expected one of the profiles in {tmp_path / 'profiles'}: cold, thin)"
    )


def test_load_rejects_rules_naming_missing_profiles(tmp_path: Path) -> None:
    """load_config refuses a folder rule or default_profile naming a profile that does
    not exist, with the key path of the offending entry."""
    rules = [{"folder_glob": "a*", "profile": "thin"}, {"folder_glob": "b*", "profile": "hot"}]
    err = _error(_profile_setup(tmp_path, profile_rules=rules, default_profile="cool"))
    assert err.key_path == "profile_rules[1].profile"
    assert "unknown profile 'hot'" in str(err)
    assert f"{tmp_path / 'cfg.yaml'}: default_profile: unknown profile 'cool'" in str(err)


def test_profile_errors_name_the_profile_file(tmp_path: Path) -> None:
    """A profile that breaks the merged config is reported against the profile file."""
    _write(tmp_path / "profiles", "bad.yaml", {"fit": {"fwhm_min_mhz": 80.0}})
    config = load_config(_write(tmp_path, "cfg.yaml", MINIMAL))
    with pytest.raises(ConfigError) as info:
        config.with_profile("bad")
    assert str(info.value) == (
        f"{tmp_path / 'profiles' / 'bad.yaml'}: fit.fwhm_min_mhz: "
        "must be below fwhm_max_mhz (60 MHz); found 80 MHz"
    )


def test_profile_may_not_set_daemon_wide_keys(tmp_path: Path) -> None:
    """A profile setting paths or the watch mode is refused, key by key."""
    _write(
        tmp_path / "profiles",
        "wide.yaml",
        {"paths": {"watch_root": "x"}, "watch": {"mode": "polling", "settle_s": 5.0}},
    )
    config = load_config(_write(tmp_path, "cfg.yaml", MINIMAL))
    with pytest.raises(ConfigError) as info:
        config.with_profile("wide")
    message = str(info.value)
    assert info.value.key_path == "paths"
    allowed = "watch, fit, field, store, rules, rule_overrides, alerts"
    assert f"paths: a profile may set only {allowed}" in message
    assert "watch.mode: a profile may set only give_up_s, settle_s in watch" in message
    assert "settle_s:" not in message


def test_profile_lists_replace_and_mappings_merge(tmp_path: Path) -> None:
    """A profile's mapping merges key by key into the base, while a list replaces it."""
    _write(
        tmp_path / "profiles",
        "p.yaml",
        {"alerts": {"hook": {"info": ["b"]}}, "rules": [{"name": "x", "kind": "zfs_drift"}]},
    )
    base = {
        **MINIMAL,
        "alerts": {"hook": {"critical": ["a", "{scan_id}"]}, "hook_timeout_s": 3.0},
        "rules": [{"name": "y", "kind": "zfs_drift"}, {"name": "z", "kind": "zfs_drift"}],
    }
    profiled = load_config(_write(tmp_path, "cfg.yaml", base)).with_profile("p")
    assert profiled.alerts.hook == {"critical": ["a", "{scan_id}"], "info": ["b"]}
    assert profiled.alerts.hook_timeout_s == 3.0
    assert profiled.rules == [{"name": "x", "kind": "zfs_drift"}]


# --------------------------------------------------------------------------- messages


def test_unknown_key_suggests_the_nearest(tmp_path: Path) -> None:
    """An unknown key is refused with the nearest valid key of its section."""
    path = _write(tmp_path, "default.yaml", {**MINIMAL, "fit": {"fwhm_mn_mhz": 2.0}})
    err = _error(path)
    assert str(err) == f"{path}: fit.fwhm_mn_mhz: unknown key; did you mean 'fwhm_min_mhz'?"
    assert (err.path, err.key_path) == (path, "fit.fwhm_mn_mhz")


def test_unknown_key_without_near_match(tmp_path: Path) -> None:
    """An unknown key far from every valid key is refused without a suggestion."""
    path = _write(tmp_path, "c.yaml", {**MINIMAL, "colour_scheme": "dark"})
    assert str(_error(path)) == f"{path}: colour_scheme: unknown key"


def test_wrong_type_names_key_expected_and_found(tmp_path: Path) -> None:
    """A value of the wrong type is reported with its key path, what was expected and
    what was found."""
    path = _write(tmp_path, "c.yaml", {**MINIMAL, "fit": {"fwhm_min_mhz": "narrow"}})
    assert str(_error(path)) == (
        f"{path}: fit.fwhm_min_mhz: expected a number; found the text 'narrow'"
    )


def test_choice_and_bound_messages(tmp_path: Path) -> None:
    """A misspelt choice gets the valid choices and a suggestion; an out-of-range number
    gets its bound; a boolean is not taken for a number."""
    path = _write(
        tmp_path,
        "c.yaml",
        {
            **MINIMAL,
            "fit": {"model": "two_dip", "contrast_max": 1.5},
            "field": {"sign": True},
        },
    )
    lines = str(_error(path)).splitlines()
    assert lines == [
        f"{path}: fit.model: expected one of 'two_dips' or 'one_dip'; found the text "
        "'two_dip'; did you mean 'two_dips'?",
        f"{path}: fit.contrast_max: expected a value of at most 1.0; found the number 1.5",
        f"{path}: field.sign: expected a whole number; found true",
    ]


def test_all_problems_in_one_error(tmp_path: Path) -> None:
    """Several problems give one ConfigError, one 'file: key: problem' line each, the
    first one in key_path."""
    path = _write(
        tmp_path,
        "c.yaml",
        {"paths": {"watch_root": "/in"}, "watch": {"mode": "inotify"}, "store": {"chunk_lines": 0}},
    )
    err = _error(path)
    assert err.key_path == "paths.output_root"
    assert str(err).splitlines() == [
        f"{path}: paths.output_root: required key is missing",
        f"{path}: watch.mode: expected one of 'native' or 'polling'; found the text 'inotify'",
        f"{path}: store.chunk_lines: expected a value of at least 1; found the number 0",
    ]


def test_cross_field_checks(tmp_path: Path) -> None:
    """Bounds that contradict each other are reported against the lower bound's key."""
    path = _write(
        tmp_path,
        "c.yaml",
        {
            **MINIMAL,
            "fit": {"center_min_mhz": 2900.0, "center_max_mhz": 2850.0},
            "watch": {"settle_s": 30.0, "give_up_s": 20.0},
        },
    )
    assert str(_error(path)).splitlines() == [
        f"{path}: watch.settle_s: must be below give_up_s (20 s); found 30 s",
        f"{path}: fit.center_min_mhz: must be below center_max_mhz (2850 MHz); found 2900 MHz",
    ]


def test_hook_placeholder_error_names_the_argument(tmp_path: Path) -> None:
    """A misspelt placeholder in a hook argument is reported at that argument's index."""
    hook = {"critical": ["notify", "{scna_id}"]}
    path = _write(tmp_path, "c.yaml", {**MINIMAL, "alerts": {"hook": hook}})
    assert str(_error(path)) == (
        f"{path}: alerts.hook.critical[1]: unknown placeholder {{scna_id}}; did you mean "
        "{scan_id}? (expected only {line}, {message}, {rule}, {scan_id}, {severity}, "
        "{state}); found the text '{scna_id}'"
    )


def test_bad_yaml_syntax_names_file_and_line(tmp_path: Path) -> None:
    """A YAML syntax error is reported with the file, line and column."""
    path = _write(tmp_path, "c.yaml", "paths:\n  watch_root: /in\n  output_root: [/out\nfit: {}\n")
    err = _error(path)
    assert str(err).startswith(f"{path}: line 4, column 4: invalid YAML: ")


def test_duplicate_key_is_refused(tmp_path: Path) -> None:
    """A key given twice in one mapping is refused instead of silently taking the last."""
    text = "paths:\n  watch_root: /a\n  output_root: /b\n  watch_root: /c\n"
    err = _error(_write(tmp_path, "c.yaml", text))
    assert err.key_path == "line 4, column 3"
    assert "key 'watch_root' given twice (first on line 2)" in str(err)


def test_top_level_must_be_a_mapping_and_file_must_exist(tmp_path: Path) -> None:
    """A YAML list at the top level and a missing file are both ConfigErrors."""
    listed = _write(tmp_path, "c.yaml", "- a\n- b\n")
    assert str(_error(listed)) == (
        f"{listed}: (top level): expected a mapping of sections; found a list of 2 items"
    )
    assert _error(tmp_path / "absent.yaml").key_path == "(file)"


# --------------------------------------------------------------------------- values


def test_relative_paths_resolve_against_the_config_folder(tmp_path: Path) -> None:
    """Relative paths anchor at the config file's folder; state_dir and alert_log default
    to below output_root; absolute paths stay as written."""
    path = _write(
        tmp_path / "etc",
        "cfg.yaml",
        {
            "paths": {"watch_root": "incoming", "output_root": "../scans"},
            "alerts": {"stop_request_file": "/run/stop.json"},
            "logging": {"json_file": "logs/strayline.jsonl"},
        },
    )
    config = load_config(path)
    assert config.paths.watch_root == tmp_path / "etc" / "incoming"
    assert config.paths.output_root == tmp_path / "scans"
    assert config.paths.state_dir == tmp_path / "scans" / ".strayline"
    assert config.paths.alert_log == tmp_path / "scans" / "alerts.jsonl"
    assert config.alerts.stop_request_file == Path("/run/stop.json")
    assert config.logging.json_file == tmp_path / "etc" / "logs" / "strayline.jsonl"
    assert config.profiles_dir == tmp_path / "etc" / "profiles"


def test_si_properties() -> None:
    """Sections offer SI values: MHz -> Hz, MiB -> bytes."""
    config = config_from_mapping(
        {
            **MINIMAL,
            "fit": {"fwhm_min_mhz": 1.5, "fwhm_max_mhz": 40, "center_min_mhz": 2800.5},
            "field": {"zfs_mhz": 2870.2},
            "limits": {"max_file_mib": 2},
            "service": {"min_free_disk_mib": 0.5},
        },
        base_dir="/",
    )
    assert config.fit.fwhm_min_hz == 1.5e6
    assert config.fit.fwhm_max_hz == 40e6
    assert config.fit.center_min_hz == 2800.5e6
    assert config.fit.center_max_hz is None
    assert config.field.zfs_hz == 2870.2e6
    assert config.limits.max_file_bytes == 2 * 1024 * 1024
    assert config.service.min_free_disk_bytes == 512 * 1024
    assert config.fit.n_dips == 2


def test_digest_ignores_key_order_and_number_spelling(tmp_path: Path) -> None:
    """The digest is the same for the same settings written in another key order or with
    1 for 1.0, and changes when a setting changes."""
    one = _write(
        tmp_path,
        "a.yaml",
        "paths: {watch_root: /in, output_root: /out}\nfit: {fwhm_min_mhz: 1, max_iter: 50}\n",
    )
    two = _write(
        tmp_path,
        "b.yaml",
        "fit: {max_iter: 50, fwhm_min_mhz: 1.0}\npaths: {output_root: /out, watch_root: /in}\n",
    )
    three = _write(
        tmp_path,
        "c.yaml",
        "fit: {max_iter: 51, fwhm_min_mhz: 1.0}\npaths: {output_root: /out, watch_root: /in}\n",
    )
    digest = config_digest(load_config(one))
    assert re.fullmatch(r"[0-9a-f]{64}", digest)
    assert config_digest(load_config(two)) == digest
    assert config_digest(load_config(three)) != digest


def test_json_dict_round_trip() -> None:
    """as_json_dict gives plain JSON values that load back into an equal config."""
    config = load_config(DEFAULT_YAML).with_profile("cryogenic-2d-magnet")
    again = config_from_mapping(config.as_json_dict(), base_dir="/elsewhere")
    assert again == config
    assert config_digest(again) == config_digest(config)


# --------------------------------------------------------------------------- property


_TEXT = st.text(alphabet=string.ascii_letters + string.digits + "-_./ ", max_size=12)


@st.composite
def _hook_argument(draw: st.DrawFn) -> str:
    parts = draw(
        st.lists(
            st.one_of(
                _TEXT,
                st.sampled_from(["{scan_id}", "{rule}", "{severity}", "{state}", "{line}"]),
            ),
            min_size=1,
            max_size=3,
        )
    )
    return "".join(parts)


@st.composite
def _overrides(draw: st.DrawFn) -> dict[str, Any]:
    finite = {"allow_nan": False, "allow_infinity": False}
    fwhm_min = draw(st.floats(0.01, 100.0, **finite))
    give_up = draw(st.floats(200.0, 1e5, **finite))
    centre_lo = draw(st.none() | st.floats(100.0, 2870.0, **finite))
    return {
        "watch": {
            "mode": draw(st.sampled_from(["native", "polling"])),
            "poll_interval_s": draw(st.floats(0.01, 100.0, **finite)),
            "settle_s": draw(st.floats(0.0, 100.0, **finite)),
            "give_up_s": give_up,
            "pattern": draw(st.sampled_from(["*.h5", "line_*.hdf5"])),
        },
        "fit": {
            "model": draw(st.sampled_from(["two_dips", "one_dip"])),
            "shared_width": draw(st.booleans()),
            "hyperfine": draw(st.sampled_from([None, "14N", "15N"])),
            "fwhm_min_mhz": fwhm_min,
            "fwhm_max_mhz": fwhm_min + draw(st.floats(0.01, 500.0, **finite)),
            "center_min_mhz": centre_lo,
            "center_max_mhz": None if centre_lo is None else centre_lo + 100.0,
            "contrast_max": draw(st.floats(0.001, 1.0, **finite)),
            "max_iter": draw(st.integers(1, 10_000)),
            "min_counts": draw(st.floats(0.0, 1e4, **finite)),
        },
        "field": {
            "zfs_mhz": draw(st.none() | st.floats(2801.0, 2949.0, **finite)),
            "sign": draw(st.sampled_from([1, -1])),
            "one_resonance_branch": draw(st.sampled_from(["upper", "lower"])),
        },
        "store": {
            "compression_level": draw(st.integers(0, 9)),
            "chunk_lines": draw(st.integers(1, 64)),
        },
        "alerts": {
            "hook": draw(
                st.dictionaries(
                    st.sampled_from(["info", "warning", "critical"]),
                    st.lists(_hook_argument(), min_size=1, max_size=3),
                )
            ),
            "hook_timeout_s": draw(st.floats(0.1, 600.0, **finite)),
        },
        "logging": {"level": draw(st.sampled_from(["debug", "info", "error"]))},
    }


def _leaves(data: dict[str, Any], prefix: tuple[str, ...] = ()) -> dict[tuple[str, ...], Any]:
    out: dict[tuple[str, ...], Any] = {}
    for key, value in data.items():
        if isinstance(value, dict) and key != "hook":
            out |= _leaves(value, (*prefix, key))
        else:
            out[(*prefix, key)] = value
    return out


@settings(max_examples=60, deadline=None)
@given(overrides=_overrides())
def test_valid_overrides_round_trip(overrides: dict[str, Any]) -> None:
    """Any valid set of overrides written to YAML loads back with exactly those values,
    consistent SI properties, and a JSON dict that reloads to an equal config."""
    with tempfile.TemporaryDirectory() as folder:
        path = _write(Path(folder), "cfg.yaml", {**MINIMAL, **overrides})
        config = load_config(path)
    loaded = config.as_json_dict()
    for key_path, value in _leaves(overrides).items():
        here: Any = loaded
        for key in key_path:
            here = here[key]
        assert here == value, key_path
    assert config.fit.fwhm_min_hz == overrides["fit"]["fwhm_min_mhz"] * 1e6
    assert config.fit.n_dips == (2 if overrides["fit"]["model"] == "two_dips" else 1)
    again = config_from_mapping(loaded, base_dir="/")
    assert again == config
    assert config_digest(again) == config_digest(config)
    assert isinstance(again, Config)


def test_load_validates_the_profiles_it_names(tmp_path: Path) -> None:
    """load_config applies every profile the config names, so a broken one stops the
    daemon at start with the profile file in the message."""
    _write(tmp_path / "profiles", "broken.yaml", {"field": {"sign": 0}})
    path = _write(tmp_path, "cfg.yaml", {**MINIMAL, "default_profile": "broken"})
    assert str(_error(path)) == (
        f"{tmp_path / 'profiles' / 'broken.yaml'}: field.sign: expected +1 or -1; "
        "found the number 0"
    )


def test_empty_path_is_refused_and_dot_is_the_config_folder(tmp_path: Path) -> None:
    """An empty path is refused, while '.' means the config file's own folder."""
    empty = _write(tmp_path, "a.yaml", {"paths": {"watch_root": "", "output_root": "out"}})
    assert str(_error(empty)) == (
        f"{empty}: paths.watch_root: expected a path to a file or folder; found the text ''"
    )
    dot = _write(tmp_path, "b.yaml", {"paths": {"watch_root": ".", "output_root": "out"}})
    assert load_config(dot).paths.watch_root == tmp_path


def test_profile_rule_overrides_merge_over_the_base_and_are_checked_at_start(
    tmp_path: Path,
) -> None:
    """A profile's rule_overrides merge rule by rule and key by key over the base
    config's; a bad one in a profile the config names stops the start, naming the
    profile file and the key path."""
    _write(
        tmp_path / "profiles",
        "ferro.yaml",
        {"rule_overrides": {"resonance_jump": {"z_above": 6.0}}},
    )
    _write(tmp_path / "profiles", "bad.yaml", {"rule_overrides": {"zfs_drift": {"drift": 1}}})
    base = {
        **MINIMAL,
        "rule_overrides": {
            "resonance_jump": {"hold_fraction": 0.6},
            "zfs_drift": {"enabled": False},
        },
    }
    profiled = load_config(_write(tmp_path, "cfg.yaml", base)).with_profile("ferro")
    assert profiled.rule_overrides == {
        "resonance_jump": {"hold_fraction": 0.6, "z_above": 6.0},
        "zfs_drift": {"enabled": False},
    }
    error = _error(_write(tmp_path, "named.yaml", {**MINIMAL, "default_profile": "bad"}))
    assert error.path == tmp_path / "profiles" / "bad.yaml"
    assert error.key_path == "rule_overrides.zfs_drift.drift"
