"""Keymaps: TOML files that map a binding id to a key, merged in a fixed order.

Order (later wins): the shipped `default.toml`, then a shipped alternative chosen by name,
then the user's file in the configuration directory, then a file given with `--keymap`.
"""

from __future__ import annotations

import difflib
import tomllib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from importlib.resources.abc import Traversable
from pathlib import Path

from textual.binding import Binding, BindingType, InvalidBinding

from triage.errors import KeymapError
from triage.tui.locations import shipped_keymaps, user_keymap_path

DEFAULT_KEYSET = "default"
"""Name of the shipped keymap every other one is laid over."""

RENAMED_IDS = {"pane-predictors": "pane-inputs", "pane-segments": "pane-groups"}
"""Binding ids of earlier versions -> today's, so an older keymap file keeps working."""


@dataclass(frozen=True)
class KeymapLayer:
    """One keymap file after reading: where it came from and what it maps."""

    label: str
    """How the file is named in messages (its path, or `shipped:<name>`)."""
    keys: dict[str, str]
    """Binding id -> key string (Textual key names, comma-separated for several keys)."""


def shipped_keysets() -> tuple[str, ...]:
    """Return the names of the shipped keymaps, `default` first."""
    names = sorted(
        entry.name.removesuffix(".toml")
        for entry in shipped_keymaps().iterdir()
        if entry.name.endswith(".toml")
    )
    others = [name for name in names if name != DEFAULT_KEYSET]
    return (DEFAULT_KEYSET, *others)


def binding_ids(bindings: Iterable[BindingType]) -> tuple[str, ...]:
    """Return the ids of `bindings` that have one, in order.

    Parameters
    ----------
    bindings : iterable of Binding or tuple
        A `BINDINGS` list.

    Returns
    -------
    tuple of str
        The binding ids.
    """
    return tuple(b.id for b in bindings if isinstance(b, Binding) and b.id is not None)


def parse_keymap(text: str, *, label: str) -> KeymapLayer:
    """Parse keymap TOML text into a layer, checking its shape.

    Parameters
    ----------
    text : str
        TOML: a flat table of `binding-id = "key"` (several keys: `"a,b"`); an id of an
        earlier version (`RENAMED_IDS`) is read as today's.
    label : str
        How to name the file in messages.

    Returns
    -------
    KeymapLayer
        The parsed layer.

    Raises
    ------
    KeymapError
        When the text is not TOML or a value is not a non-empty string.
    """
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        msg = f"keymap `{label}` is not valid TOML: {error}; fix the file or remove it"
        raise KeymapError(msg) from error
    keys: dict[str, str] = {}
    for binding_id, value in data.items():
        if not isinstance(value, str) or not value.strip():
            msg = (
                f"keymap `{label}` maps `{binding_id}` to {value!r}; "
                'each entry must be a key string such as `binding-id = "ctrl+f"`'
            )
            raise KeymapError(msg)
        try:
            key_names(value)
        except InvalidBinding as error:
            msg = f"keymap `{label}` maps `{binding_id}` to {value!r}, which holds an empty key"
            raise KeymapError(msg) from error
        keys[RENAMED_IDS.get(binding_id, binding_id)] = value.strip()
    return KeymapLayer(label=label, keys=keys)


def read_keymap(path: Path | Traversable, *, label: str | None = None) -> KeymapLayer:
    """Read one keymap file.

    Parameters
    ----------
    path : Path or Traversable
        The TOML file.
    label : str, optional
        How to name the file in messages; the path by default.

    Returns
    -------
    KeymapLayer
        The parsed layer.

    Raises
    ------
    KeymapError
        When the file cannot be read or parsed.
    """
    name = label or str(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as error:
        msg = f"cannot read keymap `{name}`: {error}; check the path given with `--keymap`"
        raise KeymapError(msg) from error
    return parse_keymap(text, label=name)


def shipped_layer(name: str) -> KeymapLayer:
    """Read a shipped keymap by name (`default`, or an alternative).

    Raises
    ------
    KeymapError
        When no shipped keymap has that name.
    """
    available = shipped_keysets()
    if name not in available:
        names = ", ".join(f"`{n}`" for n in available)
        msg = f"no shipped keymap named `{name}`; available: {names}"
        raise KeymapError(msg)
    return read_keymap(shipped_keymaps() / f"{name}.toml", label=f"shipped:{name}")


def check_layer(layer: KeymapLayer, valid_ids: Iterable[str]) -> None:
    """Check that every id in `layer` names a binding of the app.

    Raises
    ------
    KeymapError
        Naming the file, the unknown id and the closest valid ids.
    """
    known = sorted(set(valid_ids))
    for binding_id in layer.keys:
        if binding_id not in known:
            close = difflib.get_close_matches(binding_id, known, n=3, cutoff=0.5)
            hint = ", ".join(f"`{c}`" for c in close) if close else "none; see the help screen"
            msg = f"unknown binding id `{binding_id}` in keymap `{layer.label}`; closest: {hint}"
            raise KeymapError(msg)


def key_names(keys: str) -> list[str]:
    """Return the keys of a key string in Textual's own spelling (`?` becomes `question_mark`).

    Raises
    ------
    InvalidBinding
        When a key is empty.
    """
    return [binding.key for binding in Binding.make_bindings([Binding(keys, "noop")])]


def check_clashes(keymap: Mapping[str, str], *, label: str) -> None:
    """Check that no key is given to two bindings.

    Raises
    ------
    KeymapError
        Naming both bindings and the key they share.
    """
    owner: dict[str, str] = {}
    for binding_id, keys in keymap.items():
        for key in key_names(keys):
            if key in owner and owner[key] != binding_id:
                msg = (
                    f"key `{key}` is given to both `{owner[key]}` and `{binding_id}` "
                    f"after applying `{label}`; give one of them another key"
                )
                raise KeymapError(msg)
            owner[key] = binding_id


def merge_keymaps(layers: Iterable[KeymapLayer], valid_ids: Iterable[str]) -> dict[str, str]:
    """Merge layers in order (later wins) after checking each one.

    Parameters
    ----------
    layers : iterable of KeymapLayer
        Layers, lowest priority first.
    valid_ids : iterable of str
        Every binding id of the app.

    Returns
    -------
    dict of str to str
        Binding id -> key.

    Raises
    ------
    KeymapError
        For an unknown id or a key given to two bindings.
    """
    known = tuple(valid_ids)
    merged: dict[str, str] = {}
    for layer in layers:
        check_layer(layer, known)
        merged.update(layer.keys)
        check_clashes(merged, label=layer.label)
    return merged


def keymap_overrides(keymap: Mapping[str, str], declared: Mapping[str, str]) -> dict[str, str]:
    """Return the entries of `keymap` that give a binding other keys than it declares.

    Textual applies its keymap again on every key press and every look-up of the active
    bindings, at a cost that grows with the square of the bindings it names, so the app hands
    it only the entries that change a key.

    Parameters
    ----------
    keymap : mapping of str to str
        Binding id -> keys, as `load_keymap` returns it.
    declared : mapping of str to str
        Binding id -> the keys its `Binding` is declared with.

    Returns
    -------
    dict of str to str
        The entries of `keymap` whose keys differ from the declared ones.
    """
    return {
        binding_id: keys
        for binding_id, keys in keymap.items()
        if binding_id not in declared or key_names(keys) != key_names(declared[binding_id])
    }


def load_keymap(
    valid_ids: Iterable[str],
    *,
    keyset: str | None = None,
    user_file: Path | None = None,
    extra_file: Path | None = None,
) -> dict[str, str]:
    """Load the merged keymap: default, alternative, user file, then `--keymap`.

    Parameters
    ----------
    valid_ids : iterable of str
        Every binding id of the app.
    keyset : str, optional
        Name of a shipped alternative laid over the default.
    user_file : Path, optional
        The user's keymap; `keymap.toml` in the configuration directory by default.
        Skipped when it does not exist.
    extra_file : Path, optional
        A file given on the command line; it must exist.

    Returns
    -------
    dict of str to str
        Binding id -> key, ready for `App.set_keymap`.

    Raises
    ------
    KeymapError
        When a file is unreadable, malformed, names an unknown id or makes keys clash.
    """
    layers = [shipped_layer(DEFAULT_KEYSET)]
    if keyset is not None and keyset != DEFAULT_KEYSET:
        layers.append(shipped_layer(keyset))
    user = user_keymap_path() if user_file is None else user_file
    if user.is_file():
        layers.append(read_keymap(user))
    if extra_file is not None:
        layers.append(read_keymap(extra_file))
    return merge_keymaps(layers, valid_ids)
