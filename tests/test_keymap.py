"""Keymap loading: merge order, unknown ids, malformed files, clashes, config locations."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from tests import tui_support
from triage.errors import KeymapError
from triage.tui.app import all_binding_ids
from triage.tui.keymap import (
    load_keymap,
    merge_keymaps,
    parse_keymap,
    shipped_keysets,
)
from triage.tui.locations import config_dir, shipped_keymaps, user_keymap_path

config_home = tui_support.config_home


def test_keymap_default_names_every_binding(config_home: Path) -> None:
    ids = set(all_binding_ids())
    default = tomllib.loads((shipped_keymaps() / "default.toml").read_text(encoding="utf-8"))
    assert set(default) == ids


@pytest.mark.parametrize("keyset", shipped_keysets())
def test_keymap_each_shipped_keyset_loads_without_clash(config_home: Path, keyset: str) -> None:
    keymap = load_keymap(all_binding_ids(), keyset=keyset)
    assert set(keymap) == set(all_binding_ids())


def test_keymap_has_an_alternative_that_changes_keys(config_home: Path) -> None:
    alternatives = [k for k in shipped_keysets() if k != "default"]
    assert alternatives
    default = load_keymap(all_binding_ids())
    other = load_keymap(all_binding_ids(), keyset=alternatives[0])
    assert other != default


def test_keymap_merge_order_user_then_command_line(config_home: Path, tmp_path: Path) -> None:
    user = user_keymap_path()
    user.write_text('quick-fit = "z"\npane-fit = "F"\n', encoding="utf-8")
    extra = tmp_path / "mine.toml"
    extra.write_text('quick-fit = "j"\n', encoding="utf-8")
    ids = all_binding_ids()
    assert load_keymap(ids)["quick-fit"] == "z"
    merged = load_keymap(ids, extra_file=extra)
    assert merged["quick-fit"] == "j"
    assert merged["pane-fit"] == "F"
    with_keyset = load_keymap(ids, keyset="fkeys", extra_file=extra)
    assert with_keyset["pane-fit"] == "F"  # the user file wins over the alternative
    assert with_keyset["pane-spread"] == "f4"  # the alternative wins over the default


def test_keymap_file_with_pane_ids_of_earlier_versions_still_works(
    config_home: Path, tmp_path: Path
) -> None:
    # Panes are named by their titles (Inputs, Groups); a keymap written for the earlier
    # ids `pane-predictors` and `pane-segments` moves the same panes.
    older = tmp_path / "older.toml"
    older.write_text('pane-predictors = "I"\npane-segments = "G"\n', encoding="utf-8")
    merged = load_keymap(all_binding_ids(), extra_file=older)
    assert (merged["pane-inputs"], merged["pane-groups"]) == ("I", "G")
    assert "pane-predictors" not in merged


def test_keymap_unknown_id_names_file_and_closest(config_home: Path, tmp_path: Path) -> None:
    bad = tmp_path / "typo.toml"
    bad.write_text('qiut = "ctrl+x"\n', encoding="utf-8")
    with pytest.raises(KeymapError, match=r"unknown binding id `qiut`.*typo\.toml.*`quit`"):
        load_keymap(all_binding_ids(), extra_file=bad)


def test_keymap_malformed_toml_is_reported(config_home: Path, tmp_path: Path) -> None:
    bad = tmp_path / "broken.toml"
    bad.write_text("quit = \n", encoding="utf-8")
    with pytest.raises(KeymapError, match=r"broken\.toml.*not valid TOML"):
        load_keymap(all_binding_ids(), extra_file=bad)


def test_keymap_value_must_be_a_key_string() -> None:
    with pytest.raises(KeymapError, match=r"`quit` to 3"):
        parse_keymap("quit = 3\n", label="x.toml")


def test_keymap_missing_file_is_reported(config_home: Path, tmp_path: Path) -> None:
    with pytest.raises(KeymapError, match=r"cannot read keymap"):
        load_keymap(all_binding_ids(), extra_file=tmp_path / "absent.toml")


def test_keymap_unknown_keyset_lists_the_shipped_ones(config_home: Path) -> None:
    with pytest.raises(KeymapError, match=r"no shipped keymap named `vim`.*`fkeys`"):
        load_keymap(all_binding_ids(), keyset="vim")


def test_keymap_key_given_twice_is_a_clash(config_home: Path) -> None:
    layer = parse_keymap('quick-fit = "a"\n', label="mine.toml")
    base = parse_keymap('start-full-pass = "a"\nquick-fit = "s"\n', label="base")
    with pytest.raises(KeymapError, match=r"key `a` is given to both .*mine\.toml"):
        merge_keymaps([base, layer], ["quick-fit", "start-full-pass"])


def test_keymap_clash_sees_through_key_spellings(config_home: Path) -> None:
    # Textual names "?" `question_mark` (textual.keys); both spellings must count as one key.
    layer = parse_keymap('quick-fit = "?"\nshow-help = "question_mark"\n', label="mine.toml")
    with pytest.raises(KeymapError, match=r"given to both"):
        merge_keymaps([layer], ["quick-fit", "show-help"])


def test_locations_env_var_wins_and_directory_is_created(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    target = tmp_path / "a" / "b"
    monkeypatch.setenv("TRIAGE_CONFIG_DIR", str(target))
    assert config_dir() == target
    assert target.is_dir()


def test_locations_follow_xdg_config_home(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("TRIAGE_CONFIG_DIR", raising=False)
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path / "xdg"))
    assert config_dir() == tmp_path / "xdg" / "triage"
    assert user_keymap_path() == tmp_path / "xdg" / "triage" / "keymap.toml"


def test_fkeys_keyset_leaves_f10_and_f11_to_the_terminal_and_gives_each_pane_one_key() -> None:
    """Desktop terminals commonly take F10 (menu) and F11 (full screen): common practice."""
    import tomllib
    from pathlib import Path

    root = Path(__file__).resolve().parents[1] / "keymaps"
    fkeys = tomllib.loads((root / "fkeys.toml").read_text(encoding="utf-8"))
    keys = [k.strip() for value in fkeys.values() for k in value.split(",")]
    assert not {"f10", "f11"} & set(keys)
    assert len(keys) == len(set(keys))  # no key does two things
    panes = {name: value for name, value in fkeys.items() if name.startswith("pane-")}
    assert all("," not in value for value in panes.values())  # one key per pane
    assert len(set(panes.values())) == len(panes)
